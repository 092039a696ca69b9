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
import shutil
import sqlite3
import subprocess
import sys
from importlib.metadata import version
from pathlib import Path

import pytest
from chargebook.acquire.commands.demo_data import demo_metadata
from test_session_evaluation import record

from tests.bench.session_length import record_sets

#: Run one command in this process, then print (as JSON) its exit status and which of the
#: heavy modules it imported (``corrections``: its modules other than its error type, which
#: every command's error handling names).
PROBE = """
import json, sys
from chargebook.acquire.commands.cli import main
status = main(sys.argv[1:])
heavy = ("sqlite_utils", "numpy", "numpy.ma", "click", "dateutil", "importlib.metadata")
physics = any(
    name.startswith("chargebook.corrections.") and name != "chargebook.corrections.errors"
    for name in sys.modules
)
found = [name for name in heavy if name in sys.modules] + ["corrections"] * physics
print()  # the status on a line of its own, whatever the output ended with
print(json.dumps([status, sorted(found)]))
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


def test_history_of_kept_results_imports_no_physics(kept: tuple[Path, int]) -> None:
    path, _ = kept
    beam = demo_metadata()["beam"]
    output, heavy = _imports(["history", "--beam", beam, "--no-plot", "--db", str(path)])
    # every session's result is kept: none is evaluated, so neither numpy nor corrections
    assert heavy == []
    assert "cGy/MU" in output and "yes" in output  # the session listed, within tolerance


def test_history_against_a_chosen_baseline_imports_the_physics(kept: tuple[Path, int]) -> None:
    path, _ = kept
    beam = demo_metadata()["beam"]
    argv = ["history", "--beam", beam, "--baseline", "first", "--no-plot", "--db", str(path)]
    output, heavy = _imports(argv)
    # the deviation from the first session is computed now, in corrections, with numpy
    assert "numpy" in heavy and "corrections" in heavy and "sqlite_utils" not in heavy
    assert "Deviation from the first session" in output


def test_history_of_a_stale_result_evaluates_it_live(kept: tuple[Path, int], tmp_path) -> None:
    path, _ = kept
    stale = tmp_path / "stale.sqlite"
    shutil.copyfile(path, stale)
    with sqlite3.connect(stale) as connection:  # as a file kept by another version would be
        connection.execute("UPDATE session_results SET stamp = 'another version'")
    beam = demo_metadata()["beam"]
    kept_output, _ = _imports(["history", "--beam", beam, "--no-plot", "--db", str(path)])
    output, heavy = _imports(["history", "--beam", beam, "--no-plot", "--db", str(stale)])
    assert "numpy" in heavy and "corrections" in heavy  # evaluated, then only then
    assert output == kept_output  # the same result, evaluated live


def test_the_html_report_of_many_sets_imports_no_masked_arrays(tmp_path) -> None:
    # a session of sets taken and redone, as the benchmark's (invented readings, demo only)
    path = tmp_path / "station.sqlite"
    session_id = record_sets(path, 4)
    argv = ["export", str(session_id), "--format", "html", "--db", str(path)]
    output, heavy = _imports(argv)
    # each set's statistics are computed (numpy), their medians without np.median's look for
    # masked arrays, which imports numpy.ma
    assert "numpy" in heavy and "numpy.ma" not in heavy
    assert output.count("<svg") >= 4  # each set taken drawn
    # the version it was generated by, read from the installed distribution's folder name,
    # without importlib.metadata's search of every installed distribution
    assert "importlib.metadata" not in heavy
    assert f"by chargebook {version('chargebook')}." in output  # the reference library's
