"""Comparing a replay with its original.

Sessions are the invented example worksheet recorded through the Store API
(``recorded_session``: Example Clinic (fictional), demo data only).
"""

from __future__ import annotations

import math

import pytest
from chargebook.acquire.record.store import Store
from chargebook.acquire.replay.compare import (
    UNEXPLAINED,
    Change,
    Explanations,
    compare_sessions,
    plan_changes,
    stored_results,
    threshold_changes,
)
from chargebook.corrections.stability import Thresholds
from recorded_session import example_plan, record_example_session


@pytest.fixture
def station() -> Store:
    return Store.memory()


def test_the_same_session_recorded_again_compares_exactly_reading_by_reading_and_result_by_result(
    station: Store,
):
    original = record_example_session(station)
    replayed = record_example_session(station)
    comparison = compare_sessions(station, original, station, replayed)
    assert comparison.exact and comparison.differences == []
    assert comparison.readings_compared == len(station.readings(original)) == 15
    results, error = stored_results(station, original)
    assert error is None and comparison.results_compared == len(results)


def test_a_charge_one_part_in_ten_million_off_is_a_difference_nobody_explains(station: Store):
    original = record_example_session(station)
    scale = 1.0000001
    replayed = record_example_session(station, scale=scale)
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
    replayed = record_example_session(station, scale=1.001)
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
