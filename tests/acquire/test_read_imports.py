"""What the read commands import (issue 17, target 6: the record at scale).

A read command runs in a new process each time, so every module it imports is paid for on every
run. `sessions` and `history` read a station file whose closed sessions keep their results (the
daemon's store, ``acquire/session/stored_result.py``): they open it with plain sqlite3, not
sqlite-utils (which brings numpy, click and dateutil and scans the installed distributions'
plugins), and `sessions`, which computes nothing, imports no numpy either. Checked in a new
Python process, through ``sys.modules``, on a session recorded with the real engine into a real
SQLite file (invented readings, demo only).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from chargebook.acquire.commands.demo_data import demo_metadata
from test_session_evaluation import record

#: Run one command in this process, then print (as JSON) its exit status and which of the
#: heavy modules it imported.
PROBE = """
import json, sys
from chargebook.acquire.commands.cli import main
status = main(sys.argv[1:])
heavy = ("sqlite_utils", "numpy", "click", "dateutil")
print(json.dumps([status, sorted(name for name in heavy if name in sys.modules)]))
"""


@pytest.fixture(scope="module")
def kept(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, int]:
    """A finished session whose result the store kept as it closed."""
    path = tmp_path_factory.mktemp("kept") / "station.sqlite"
    session_id, _ = record(path, keep_results=True)
    return path, session_id


def _imports(argv: list[str]) -> tuple[str, list[str]]:
    """Run ``chargebook ARGV`` in a new process; return what it printed and the heavy modules
    it imported."""
    done = subprocess.run(
        [sys.executable, "-c", PROBE, *argv], capture_output=True, text=True, timeout=120
    )
    assert done.returncode == 0, done.stderr
    output, _, last = done.stdout.rstrip("\n").rpartition("\n")
    status, heavy = json.loads(last)
    assert status == 0, done.stderr
    return output, heavy


def test_sessions_imports_neither_sqlite_utils_nor_numpy(kept: tuple[Path, int]) -> None:
    path, session_id = kept
    output, heavy = _imports(["sessions", "--db", str(path)])
    assert heavy == []
    assert f"\n{session_id} " in f"\n{output}"  # the session is listed, read all the same


def test_history_of_kept_results_imports_no_sqlite_utils(kept: tuple[Path, int]) -> None:
    path, _ = kept
    beam = demo_metadata()["beam"]
    output, heavy = _imports(["history", "--beam", beam, "--no-plot", "--db", str(path)])
    # numpy still comes with the physics that history computes (deviation from a baseline)
    assert "sqlite_utils" not in heavy and "click" not in heavy and "dateutil" not in heavy
    assert "cGy/MU" in output
