"""ionwell: unattended guest-ion insertion series with provenance and analysis."""

from __future__ import annotations

from pathlib import Path

__version__ = "0.1.0"


def snakefile() -> Path:
    """Path of the packaged Snakefile, for use as a Snakemake ``module``."""
    here = Path(__file__).resolve().parent
    for candidate in (here / "workflow" / "Snakefile", here.parents[1] / "workflow" / "Snakefile"):
        if candidate.is_file():
            return candidate
    raise FileNotFoundError("ionwell's workflow/Snakefile is missing from this installation")
