"""`chargebook run --unattended` refuses bad operator input before a session starts.

The real CLI (in this process) on the real simulator's pseudo-terminal and bench, writing a real
SQLite file. A value the daemon would refuse is refused first, in one line naming the option,
with exit status 2 and nothing recorded; a refusal from the daemon itself is one line too.
"""

from __future__ import annotations

import json

import pytest
from chargebook.acquire.commands import cli
from e2e_support import QUICK_PLAN, TIME_SCALE

from tests.acquire.test_daemon_session import stored


def run_args(simulator, db, *extra: str) -> list[str]:
    return [
        "run", "--unattended", "--profile", simulator.profile, "--port", simulator.serial,
        "--bench-control", simulator.control, "--db", str(db), "--plan", QUICK_PLAN,
        "--time-scale", str(TIME_SCALE), *extra,
    ]  # fmt: skip


@pytest.mark.parametrize(
    ("given", "option"),
    [
        # 71.6 °F typed as °C; 10–40 °C is the plausible range (common practice)
        (["--temperature-C", "71.6", "--pressure-kPa", "100.8"], "--temperature-C = 71.6"),
        # a pressure in hPa typed as kPa; 60–110 kPa is the plausible range (common practice)
        (["--temperature-C", "21.5", "--pressure-kPa", "1008"], "--pressure-kPa = 1008"),
    ],
)
def test_run_refuses_an_implausible_environment_before_any_session(
    simulator, tmp_path, capsys, given, option
):
    db = tmp_path / "station.sqlite"
    status = cli.main(run_args(simulator, db, *given))
    error = capsys.readouterr().err
    assert status == 2
    assert option in error and "outside the allowed range" in error
    assert "Traceback" not in error and len(error.strip().splitlines()) == 1
    if db.exists():
        with stored(db) as store:
            assert store.sessions() == []
    # the next good run on the same file is not refused
    status = cli.main(run_args(simulator, db, "--temperature-C", "21.5", "--pressure-kPa", "100.8"))
    assert status == 0, capsys.readouterr().err


def test_run_reports_a_daemon_refusal_in_one_line(simulator, tmp_path, capsys, metadata):
    bad = dict(metadata, convention="no-such-protocol")
    path = tmp_path / "metadata.json"
    path.write_text(json.dumps(bad), encoding="utf-8")
    db = tmp_path / "station.sqlite"
    given = ["--metadata", str(path), "--temperature-C", "21.5", "--pressure-kPa", "100.8"]
    status = cli.main(run_args(simulator, db, *given))
    error = capsys.readouterr().err
    assert status == 2, error
    assert "Traceback" not in error
    assert [line for line in error.splitlines() if line.startswith("chargebook run:")] == [
        line for line in error.splitlines() if line.strip()
    ]
    assert "convention" in error
