import sys

from chargebook.acquire.cli import main

sys.exit(main())
