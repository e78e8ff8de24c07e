"""The ``ionwell`` command: argument parsing and printing; everything else is a call into the
package."""

from ionwell.cli.commands import main

__all__ = ["main"]
