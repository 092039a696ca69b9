"""Make the repository root importable, so the scripts' ``tests.bench`` / ``tests.faults``
imports work under any pytest runner (``python -m pytest`` adds it already)."""

import sys
from pathlib import Path

ROOT = str(Path(__file__).resolve().parents[2])
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)
