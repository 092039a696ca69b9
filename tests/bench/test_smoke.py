"""Each benchmark's ``--smoke`` run: it runs, from the repository root, and prints its figures.

No timing is asserted here (speed belongs to the scripts' full runs, by hand): only that each
script ran to its end and printed a baseline, a measured figure, their ratio, at least one
target and a result, in the shape ``tests.bench.report`` prints.
"""

from __future__ import annotations

import pytest

from tests.bench import report
from tests.bench.harness import run_smoke

pytestmark = pytest.mark.e2e

SCRIPTS = [
    "pipeline",
    "scpi",
    "reanalysis",
    "startup",
    "console_latency",
    "publish",
    pytest.param("memory", marks=pytest.mark.slow),  # some 5 s: sessions of every size
    pytest.param("session_length", marks=pytest.mark.slow),  # two daemons, some 20 s
    pytest.param("record_scale", marks=pytest.mark.slow),  # a station file made, some 10 s
    pytest.param("replay", marks=pytest.mark.slow),  # a visit recorded and replayed, some 15 s
]


@pytest.mark.parametrize("name", SCRIPTS)
def test_the_smoke_run_prints_its_figures(name: str) -> None:
    done = run_smoke(f"tests.bench.{name}")
    assert done.returncode in (report.EXIT_MET, report.EXIT_MISSED), done.stderr
    lines = report.parse(done.stdout)
    said = f"{done.stdout}\n{done.stderr}"  # a script that stopped early says why on stderr
    assert set(lines) == {"baseline", "measured", "ratio", "target", "result"}, said
    assert all(line.endswith((report.MET, report.MISSED)) for line in lines["target"])
    met = all(line.endswith(report.MET) for line in lines["target"])
    assert lines["result"] == [report.MET if met else report.MISSED]
    assert (done.returncode == report.EXIT_MET) == met
    if name == "replay":  # beside the target's baseline, the floor of a replay that must query
        assert len(lines["baseline"]) == len(lines["ratio"]) == 2, said
        assert "query/answer round trips" in lines["baseline"][1], said
