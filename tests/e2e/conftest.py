"""End-to-end fixtures: the real simulator and the real daemon as subprocesses.

They live in ``e2e_support.py`` (importable by other test folders, see its docstring); this
file only makes them visible to the tests here.
"""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

from e2e_support import (  # noqa: F401
    daemon,
    metadata,
    simulator,
    start_daemon,
    start_simulator,
)
