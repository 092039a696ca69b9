import sys

from chargebook.acquire.commands.cli import main

sys.exit(main())
