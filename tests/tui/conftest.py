"""Fixtures of the console's tests: the harness module is importable as ``harness``."""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
