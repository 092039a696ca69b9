"""Carrying k_pol and k_s into an output check at session start, and history telling kinds apart.

A real SQLite store holding the invented example (DEMO-LA1 6 MV, recorded_session)
as full calibrations; the output check is recorded as the engine records one. Check values are
identities: the carried factor is the full calibration's own k_pol and k_s.
"""

from __future__ import annotations

from datetime import datetime, timedelta
from pathlib import Path

import pytest
from chargebook.acquire.record.store import Store
from chargebook.acquire.reports.history import history_table, load_history, plot_labels
from chargebook.acquire.reports.html import history_html
from chargebook.acquire.session.carried import carried_metadata
from chargebook.acquire.session.evaluation import evaluate_session
from chargebook.acquire.session.plan import load_plan
from chargebook.corrections.errors import InputError
from recorded_session import example, example_metadata, record_example_session

MONTHLY = load_plan("monthly-check")
TODAY = "2026-12-03"


class StoreClock:
    """A store's clock for tests (``Store.open(now=...)``): from ``start``, a millisecond later
    at each reading of it. An output check dated TODAY carries from sessions recorded before
    it only if they are recorded on TODAY, whatever the date the tests run on."""

    def __init__(self, start: datetime | None = None) -> None:
        self.now = start or datetime.fromisoformat(f"{TODAY}T08:00:00+00:00")

    def __call__(self) -> datetime:
        self.now += timedelta(milliseconds=1)
        return self.now


@pytest.fixture
def store(tmp_path: Path) -> Store:
    with Store.open(tmp_path / "station.sqlite", now=StoreClock()) as opened:
        yield opened


def record_output_check(store: Store, metadata: dict) -> int:
    """Record a finished monthly check with the example's routine readings; return its id."""
    session_id = store.create_session(metadata, MONTHLY.to_dict(), "trs398", "6 MV")
    env = example()["environment"]
    store.add_environment(
        session_id, env["temperature_C"], env["pressure_kPa"], env["pressure_kPa"], "kPa", None,
        "operator",
    )  # fmt: skip
    set_id = store.add_set(session_id, 1, "routine", "routine", 1, 300.0, 1)
    for seq, charge in enumerate(example()["readings"]["routine_nC"], start=1):
        store.add_reading(session_id, set_id, seq, 10.0 * seq, charge, "auto", False, "ok")
    store.set_set_status(set_id, "reviewing")
    store.set_set_status(set_id, "accepted")
    store.set_session_status(session_id, "finished", "plan complete")
    return session_id


def test_the_last_finished_full_calibration_of_the_same_chamber_is_carried(store: Store) -> None:
    first = record_example_session(store)
    second = record_example_session(store, scale=1.002)
    record_example_session(store, status="aborted")
    record_example_session(store, replay_of=second)
    record_example_session(store, chamber_serial="SIM-CH-0002")
    metadata = carried_metadata(store, example_metadata(), MONTHLY, TODAY)
    full = evaluate_session(store, second).evaluation
    assert first != second
    for key in ("k_pol", "k_s"):
        copied = metadata[f"carried_{key}"]
        assert copied["value"] == full.factors[key].value  # bit for bit
        assert copied["u_pct"] == full.factors[key].u_rel_pct  # its Type A, carried as Type B
        assert copied["from_session"] == second and copied["session_date"] == TODAY
        date = store.session(second).created_at[:10]
        assert copied["source"] == f"session {second} of {date}, full calibration"


def test_an_output_checks_record_keeps_its_copy_and_history_tells_kinds_apart(
    store: Store, tmp_path: Path
) -> None:
    full_id = record_example_session(store)
    check_id = record_output_check(
        store, carried_metadata(store, example_metadata(), MONTHLY, TODAY)
    )
    before = evaluate_session(store, check_id).results()
    record_example_session(store, scale=1.01)  # a later calibration changes no old record
    after = evaluate_session(store, check_id).results()
    assert before == after
    full = evaluate_session(store, full_id).results()
    assert after["factor_states"]["k_pol"] == "carried"
    # Same readings, same air, the full calibration's factors: the same dose (TRS-398 product).
    assert after["dose_Gy"] == pytest.approx(full["dose_Gy"], rel=1e-3)
    assert after["k_pol"] == full["k_pol"] and after["k_s"] == full["k_s"]
    history = load_history(store, "6 MV")
    assert [p.kind for p in history.points] == [
        "full calibration", "output check", "full calibration",
    ]  # fmt: skip
    table = history_table(history)
    assert "kind" in table.headers
    page = history_html(history, table, "now")
    assert page.count('data-kind="output check"') == 1
    assert page.count('class="point hollow') == 1
    labels, legend = plot_labels(history)
    assert labels == [str(full_id), f"{check_id}*", str(check_id + 1)]
    assert legend is not None and "output check" in legend


def test_a_factor_from_another_chamber_or_electrometer_is_refused(store: Store) -> None:
    record_example_session(store, chamber_serial="SIM-CH-0002")
    record_example_session(store, electrometer_serial="SIM-EM-0002")
    metadata = carried_metadata(store, example_metadata(), MONTHLY, TODAY)
    assert metadata["carried_k_pol"] is None and metadata["carried_k_s"] is None  # pending
    entered = {"value": 1.001, "source": "report 2026-03", "date": "2026-03-02"}
    with pytest.raises(
        InputError, match=r"carried_k_s\.electrometer_serial .*another electrometer"
    ):
        example_metadata(
            carried_k_pol=entered, carried_k_s={**entered, "electrometer_serial": "SIM-EM-0003"}
        )
    with pytest.raises(InputError, match=r"carried_k_pol\.date .*is in the future"):
        example_metadata(carried_k_pol={**entered, "date": "2099-01-01"})
    with pytest.raises(InputError, match=r"carried_k_pol\.source .*is missing"):
        example_metadata(carried_k_pol={"value": 1.001, "date": "2026-03-02"})
    assert store.sessions()[0].status == "finished"  # nothing recorded is touched


def test_entered_factors_are_kept_and_a_measured_one_cannot_also_be_carried(store: Store) -> None:
    entered = {"value": 1.0011, "source": "annual calibration report 2026-03", "date": "2026-03-02"}
    metadata = carried_metadata(
        store, example_metadata(carried_k_pol=entered, carried_k_s=entered), MONTHLY, TODAY
    )
    assert metadata["carried_k_pol"]["source"] == entered["source"]
    assert metadata["carried_k_pol"]["session_date"] == TODAY
    full_plan = load_plan("default")
    with pytest.raises(InputError, match=r"carried_k_pol .*is both measured and carried"):
        carried_metadata(store, example_metadata(carried_k_pol=entered), full_plan, TODAY)


def test_an_old_entered_factor_is_flagged_against_the_sessions_own_start_date(
    store: Store,
) -> None:
    old = {"value": 1.0011, "source": "annual calibration report", "date": "2025-11-01"}
    metadata = carried_metadata(
        store, example_metadata(carried_k_pol=old, carried_k_s=old), MONTHLY, TODAY
    )
    results = evaluate_session(store, record_output_check(store, metadata)).results()
    flag = next(f for f in results["flags"] if f["code"] == "k_pol_carried_old")
    assert "397 days" in flag["message"]  # 2025-11-01 to 2026-12-03, the session's start
    assert results["carried"]["k_s"]["age_days"] == 397
    assert results["factor_states"]["k_s"] == "carried" and results["dose_Gy"] is not None
