"""Run the `chargebook` command line: ``python -m chargebook`` is ``chargebook``."""

import sys

from chargebook.acquire.commands.cli import main

sys.exit(main())
