"""Fixtures of the console's tests.

The end-to-end fixtures (the real ``chargebook simulate`` and ``chargebook serve`` processes)
come from ``tests/e2e/e2e_support.py``, as its docstring describes.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parents[1] / "e2e"))

from e2e_support import (  # noqa: F401
    daemon,
    metadata,
    simulator,
    start_daemon,
    start_simulator,
)


@pytest.fixture(autouse=True)
def universal_time(monkeypatch):
    """Run the console's tests in UTC, so local times on screen are the same on any machine."""
    monkeypatch.setenv("TZ", "UTC")
    time.tzset()
    yield
    monkeypatch.undo()
    time.tzset()
