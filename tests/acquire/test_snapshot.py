"""The snapshot while readings stream: a reading goes out at once, its set's statistics follow.

Through the real engine and a real SQLite file. While readings stream in, the daemon shows the
results computed last and computes them again at most every few tenths of a second
(``daemon.RESULTS_INTERVAL_S``); a set that only gained readings is shown the same way: its new
readings at once, its statistics and flags as computed last, and computed again in the snapshot
that brings the results. The charges are invented (demo data); the statistics are checked
against ``corrections.statistics.set_statistics``, the one place they are computed.
"""

from __future__ import annotations

from pathlib import Path

from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.record.store import Store
from chargebook.acquire.session.plan import Plan, SettlingRule, Step
from chargebook.corrections.statistics import set_statistics
from chargebook.drivers_generic.interface import Capability

from tests.acquire.test_engine import CAPTURE, METADATA, Clock

CAPABILITIES = {Capability.ZERO, Capability.INTEGRATE, Capability.READ_CHARGE, Capability.SET_BIAS}
#: One routine set of five readings, none of them settling.
PLAN = Plan(
    "five readings",
    (Step("routine", "routine", 1, 300.0, 5, 100.0, SettlingRule()),),
    300.0,
    100.0,
    capture=CAPTURE,
)


def collecting_engine(tmp_path: Path) -> tuple[Engine, Clock]:
    """Return an engine on a remembering store (as the daemon's), its routine set armed."""
    clock = Clock()
    store = Store.open(tmp_path / "station.sqlite")
    store.remember_rows()
    engine = Engine(store, capabilities=CAPABILITIES, clock=clock)
    engine.start_session(METADATA, PLAN)
    engine.set_environment(20.0, 101.325)
    engine.arm()
    return engine, clock


def take(engine: Engine, clock: Clock, charge_nC: float) -> None:
    """Take one reading as an electrometer that pushes each completed reading sends it."""
    clock.now += 1.0
    engine.on_sample(clock.now, charge_nC, complete=True)


def test_a_streamed_reading_is_shown_at_once_and_its_sets_statistics_follow(
    tmp_path: Path,
) -> None:
    engine, clock = collecting_engine(tmp_path)
    for charge_nC in (20.0, 20.1):
        take(engine, clock, charge_nC)
    before = engine.snapshot()["current_set"]
    earlier_results = engine.last_results
    take(engine, clock, 20.2)
    streamed = engine.snapshot(earlier_results)["current_set"]
    # the reading at once, labelled and counted; the earlier readings the very same entries
    assert [r["charge_nC"] for r in streamed["readings"]] == [20.0, 20.1, 20.2]
    assert [r["label"] for r in streamed["readings"]] == ["1", "2", "3"]
    assert streamed["readings_done"] == 3
    assert all(a is b for a, b in zip(streamed["readings"], before["readings"], strict=False))
    # the statistics and flags as computed last (of two readings): they follow
    assert streamed["stats"] == before["stats"]
    assert streamed["stats"]["count"] == 2
    followed = engine.snapshot()["current_set"]
    assert followed["stats"] == set_statistics([20.0, 20.1, 20.2]).to_dict()
    assert followed["readings"] == streamed["readings"]
    engine.store.close()


def test_a_set_shown_with_earlier_statistics_gets_them_even_if_no_reading_follows(
    tmp_path: Path,
) -> None:
    engine, clock = collecting_engine(tmp_path)
    take(engine, clock, 20.0)
    take(engine, clock, 20.1)
    earlier_results = engine.snapshot() and engine.last_results
    take(engine, clock, 30.0)  # a spike (invented): flagged once the statistics come
    assert engine.snapshot(earlier_results)["current_set"]["stats"]["count"] == 2
    # the next snapshot that shows the results computed last still computes the set's
    again = engine.snapshot(earlier_results)["current_set"]
    assert again["stats"] == set_statistics([20.0, 20.1, 30.0]).to_dict()
    assert again["readings_done"] == 3
    engine.store.close()
