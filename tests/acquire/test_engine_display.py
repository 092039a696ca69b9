"""Nothing that only displays may raise: odd but real readings, through the engine and a real
SQLite file, leave the snapshot standing with a flag in words, and the session goes on.

The cases are facts of the trade (common practice): a leakage reading of exactly zero is the
best an electrometer can show; a set whose readings change sign means a bias or cable fault; a
reading of 1e-12 nC (1 fC) is at the resolution of a good electrometer on its lowest range.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.protocol import NOTIFY_SNAPSHOT, encode_from_daemon, notification
from chargebook.acquire.record.store import Store
from chargebook.acquire.session.plan import Plan, SettlingRule, Step
from chargebook.drivers_generic.interface import Capability

from tests.acquire.test_engine import CAPTURE, METADATA, ONE, Clock, small_plan

CAPABILITIES = {Capability.ZERO, Capability.INTEGRATE, Capability.READ_CHARGE, Capability.SET_BIAS}


def file_engine(path: Path, clock: Clock) -> Engine:
    return Engine(Store.open(path), capabilities=CAPABILITIES, clock=clock)


def standing(engine: Engine) -> dict:
    """Return the engine's snapshot after checking it goes out as one protocol message."""
    snapshot = engine.snapshot()
    assert encode_from_daemon(notification(NOTIFY_SNAPSHOT, snapshot)).endswith(b"\n")
    return snapshot


def take(engine: Engine, clock: Clock, charge_nC: float) -> None:
    """Take one reading as an electrometer that pushes each completed reading sends it."""
    assert engine.reading is not None
    clock.now += 1.0
    engine.on_sample(clock.now, charge_nC, complete=True)


def codes(flags: list[dict]) -> list[str]:
    return [flag["code"] for flag in flags]


def test_a_leakage_set_of_exact_zeros_is_a_word_in_the_snapshot(tmp_path: Path) -> None:
    leakage = Step("leakage", "leakage", 1, 300.0, 2, 0.0, SettlingRule(), duration_s=2.0)
    plan = Plan("with leakage", (leakage, *small_plan().steps), 300.0, 100.0, capture=CAPTURE)
    clock = Clock()
    engine = file_engine(tmp_path / "station.sqlite", clock)
    engine.start_session(METADATA, plan)
    engine.set_environment(20.0, 101.325)
    engine.arm()
    for _ in range(2):
        take(engine, clock, 0.0)
    snapshot = standing(engine)
    assert snapshot["current_set"]["stats"] is None
    assert codes(snapshot["current_set"]["flags"]) == ["leakage_zero"]
    assert "set.accept" in snapshot["allowed"]
    engine.accept()
    assert standing(engine)["state"] == "waiting_for_operator"
    engine.store.close()


@pytest.mark.parametrize(
    ("charges_nC", "set_flag", "results_refused"),
    [
        # the sign changes within the set (settling reading first): the results refuse the
        # contradicting reading, the readings list flags it, the statistics still stand
        ([20.5, 20.0, -20.0, 20.0], None, True),
        # the sign changes and the readings average zero: no relative spread exists
        ([20.5, 2.0, -4.0, 2.0], "statistics_unavailable", True),
        # readings of about 1 fC
        ([1.2e-12, 1e-12, 1.1e-12, 1.05e-12], None, False),
    ],
)
def test_odd_readings_leave_the_snapshot_standing_and_the_session_going_on(
    tmp_path: Path, charges_nC: list[float], set_flag: str | None, results_refused: bool
) -> None:
    clock = Clock()
    path = tmp_path / "station.sqlite"
    engine = file_engine(path, clock)
    session_id = engine.start_session(METADATA, small_plan(ONE))
    engine.set_environment(20.0, 101.325)
    engine.arm()
    for charge in charges_nC:
        take(engine, clock, charge)
    snapshot = standing(engine)
    current = snapshot["current_set"]
    assert len(current["readings"]) == len(charges_nC)
    if set_flag is not None:
        assert current["stats"] is None and set_flag in codes(current["flags"])
    else:
        assert current["stats"]["count"] == 3
    if results_refused:
        assert snapshot["results"] is None
        assert "contradicts the bias" in snapshot["results_error"]
        flagged = [r for r in current["readings"] if "sign_against_bias" in codes(r["flags"])]
        assert flagged, "the readings list shows which reading the results refuse"
    else:
        assert snapshot["results_error"] is None
    assert {"set.accept", "set.redo"} <= set(snapshot["allowed"])
    engine.store.close()
    # What is on disk stands too: a restarted daemon's engine shows the same set.
    revived = file_engine(path, clock)
    assert revived.restore() and revived.session_id == session_id
    again = standing(revived)
    assert [r["charge_nC"] for r in again["current_set"]["readings"]] == charges_nC
    revived.redo("the bias cable was loose")
    assert standing(revived)["state"] == "waiting_for_operator"
    revived.store.close()
