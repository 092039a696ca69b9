"""Comparing a replay with its original, and writing a finished replay into the station.

Sessions are the invented example worksheet recorded through the Store API
(``recorded_session``: Example Clinic (fictional), demo data only).
"""

from __future__ import annotations

import math
import sqlite3

import pytest
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import NotFound, Store
from chargebook.acquire.replay.compare import (
    UNEXPLAINED,
    Change,
    Explanations,
    compare_sessions,
    plan_changes,
    stored_results,
    threshold_changes,
)
from chargebook.acquire.replay.kept_copy import copy_session
from chargebook.corrections.stability import Thresholds
from recorded_session import example_plan, record_example_session


@pytest.fixture
def station() -> Store:
    return Store.memory()


def test_a_copied_session_compares_exactly_reading_by_reading_and_result_by_result(
    station: Store,
):
    original = record_example_session(station)
    scratch = Store.memory()
    replayed = copy_session(scratch, record_example_session(scratch), station, original)
    comparison = compare_sessions(station, original, station, replayed)
    assert comparison.exact and comparison.differences == []
    assert comparison.readings_compared == len(station.readings(original)) == 15
    results, error = stored_results(station, original)
    assert error is None and comparison.results_compared == len(results)


def test_the_copy_links_every_row_and_event_to_the_new_session(station: Store):
    original = record_example_session(station)
    scratch = Store.memory()
    source = record_example_session(scratch)
    replayed = copy_session(scratch, source, station, original)
    assert station.session(replayed).replay_of == original
    new_sets = {s.id for s in station.sets(replayed)}
    new_readings = {r.id for r in station.readings(replayed)}
    new_environment = {e.id for e in station.environment(replayed)}
    assert {r.set_id for r in station.readings(replayed)} <= new_sets
    for event in station.events(replayed):
        detail = event.detail()
        assert detail.get("set_id", min(new_sets)) in new_sets
        assert detail.get("reading_id", min(new_readings)) in new_readings
        assert detail.get("environment_id", min(new_environment)) in new_environment
    created = next(e for e in station.events(replayed) if e.kind == EventKind.SESSION_CREATED)
    assert created.detail()["replay_of"] == original
    assert [t.line for t in station.traffic(replayed)] == [t.line for t in scratch.traffic(source)]


def test_a_copy_that_fails_part_way_writes_nothing(station: Store):
    original = record_example_session(station)
    scratch = Store.memory()
    source = record_example_session(scratch)
    counts = {t: station.db.execute(f"SELECT count(*) FROM {t}").fetchone()[0] for t in TABLES}
    station.db.execute(
        "CREATE TEMP TRIGGER refuse_events BEFORE INSERT ON events "
        "BEGIN SELECT RAISE(ABORT, 'disk full'); END"
    )
    with pytest.raises(sqlite3.IntegrityError, match="disk full"):
        copy_session(scratch, source, station, original)
    after = {t: station.db.execute(f"SELECT count(*) FROM {t}").fetchone()[0] for t in TABLES}
    assert after == counts
    with pytest.raises(NotFound):
        copy_session(scratch, source, station, 99)


TABLES = ("sessions", "reading_sets", "readings", "environment", "events", "traffic")


def test_a_charge_one_part_in_ten_million_off_is_a_difference_nobody_explains(station: Store):
    original = record_example_session(station)
    scratch = Store.memory()
    scale = 1.0000001
    replayed = copy_session(
        scratch, record_example_session(scratch, scale=scale), station, original
    )
    comparison = compare_sessions(station, original, station, replayed)
    charges = [d for d in comparison.differences if d.what.endswith("charge_nC")]
    leakage = 1  # the leakage reading is not scaled by the example's helper
    assert len(charges) == len(station.readings(original)) - leakage
    assert all(math.isclose(d.replay, d.original * scale, rel_tol=1e-15) for d in charges)
    assert all(d.why == UNEXPLAINED for d in charges)
    results = {d.what: d.why for d in comparison.differences if d.what.startswith("result")}
    assert (
        results["result M_raw_nC"] == "the readings or sets it is computed from differ (see above)"
    )


def test_a_what_if_threshold_is_given_as_the_reason_for_flags(station: Store):
    original = record_example_session(station)
    change = Change("threshold relative_sd_pct", 0.2, 0.01)
    scratch = Store.memory()
    replayed = copy_session(
        scratch, record_example_session(scratch, scale=1.001), station, original
    )
    comparison = compare_sessions(station, original, station, replayed, Explanations([change]))
    reasons = {d.what: d.why for d in comparison.differences}
    assert "threshold relative_sd_pct 0.2 → 0.01" in reasons["result M_raw_nC"]
    assert "readings or sets it is computed from differ" in reasons["result M_raw_nC"]


def test_plan_changes_name_each_field_and_step_that_differs():
    plan = example_plan().to_dict()
    other = example_plan().to_dict()
    other["reduced_bias_V"] = 150.0
    other["steps"][3]["bias_V"] = 150.0
    other["steps"][1]["readings"] = 4
    other["name"] = "what-if"
    assert [c.words() for c in plan_changes(plan, other)] == [
        "plan name example-clinic → what-if",
        "plan reduced_bias_V 100.0 → 150.0",
        "plan step 'routine' readings 5 → 4",
        "plan step 'reduced' bias_V 100.0 → 150.0",
    ]


def test_threshold_changes_list_only_the_thresholds_that_differ():
    changes = threshold_changes(Thresholds(), Thresholds(relative_sd_pct=0.1, leakage_pct=0.05))
    assert [c.words() for c in changes] == [
        "threshold relative_sd_pct 0.2 → 0.1",
        "threshold leakage_pct 0.1 → 0.05",
    ]
