"""Fixtures of the console's tests.

The end-to-end fixtures (the real ``chargebook simulate`` and ``chargebook serve`` processes)
come from ``tests/e2e/e2e_support.py``, as its docstring describes.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parents[1] / "e2e"))

from e2e_support import (  # noqa: F401
    daemon,
    metadata,
    simulator,
    start_daemon,
    start_simulator,
)
