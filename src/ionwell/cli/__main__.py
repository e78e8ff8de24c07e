"""``python -m ionwell.cli``: the ``ionwell`` command without its console script."""

import sys

from ionwell.cli.commands import main

sys.exit(main())
