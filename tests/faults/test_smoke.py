"""Each fault run's ``--smoke`` run, from the repository root: small counts, real processes.

Unlike speed, what a fault run counts does not depend on the machine: readings lost, sessions
resumed, drops recorded, lines logged, messages refused. So besides printing its figures, each
smoke run must meet its targets, except those about time (a round trip, a delay), which a
loaded machine can miss: a smoke run prints them but they do not decide its result.
"""

from __future__ import annotations

import pytest

from tests.bench import report
from tests.bench.harness import run_smoke

pytestmark = pytest.mark.e2e

#: The fault runs, the ones whose smoke run takes more than a few seconds marked slow.
SCRIPTS = [
    pytest.param("kill9", marks=pytest.mark.slow),
    pytest.param("drop", marks=pytest.mark.slow),
    "fuzz_lines",
    "bad_rpc",
    pytest.param("store_faults", marks=pytest.mark.slow),
    pytest.param("stalled_clients", marks=pytest.mark.slow),
]


@pytest.mark.parametrize("name", SCRIPTS)
def test_the_smoke_run_meets_its_targets(name: str) -> None:
    done = run_smoke(f"tests.faults.{name}")
    lines = report.parse(done.stdout)
    assert {"baseline", "measured", "ratio", "target", "result"} <= set(lines), done.stderr
    assert lines["result"] == [report.MET], done.stdout
    assert done.returncode == report.EXIT_MET
