"""MU per reading (issue 15 item 4): chosen in the setup, and a delivery that stopped short.

The engine without I/O (tests/acquire/test_engine.py's plain plan, in-memory store, hand clock).
The check values are written out from docs/physics.md section 4: a reading's charge is
proportional to the MU delivered (common practice), so a reading of 10 nC at 50 MU is 20 nC at
the 100 MU planned.
"""

from __future__ import annotations

import pytest
from chargebook.acquire.engine.states import IllegalTransition
from chargebook.acquire.protocol import EngineState
from chargebook.acquire.reports.audit import event_words
from chargebook.acquire.reports.data import load_record
from chargebook.acquire.session.evaluation import evaluate_session
from chargebook.acquire.session.plan import load_plan
from chargebook.corrections.errors import InputError

from tests.acquire.test_engine import METADATA, make_engine, started, take_set

OPERATOR = "operator A"


def _routine_with_a_short_delivery():
    engine, clock = make_engine()
    session_id = started(engine)
    # settling reading, two full deliveries, and one that stopped at 50 of 100 MU
    take_set(engine, clock, [20.5, 20.0, 20.0, 10.0])
    short = engine.store.readings(session_id)[-1]
    return engine, session_id, short


def test_a_short_delivery_is_referred_to_the_planned_MU_in_the_live_and_stored_results():
    engine, session_id, short = _routine_with_a_short_delivery()
    before, _, _ = engine.results()
    assert before["M_raw_nC"] == pytest.approx((20.0 + 20.0 + 10.0) / 3)
    engine.record_short_delivery(short.id, 50.0, "beam hold: door interlock", actor=OPERATOR)
    after, _, _ = engine.results()
    # M_at_planned = M_read · MU_planned / MU_actual = 10.0 · 100 / 50 (docs/physics.md, 4)
    assert after["M_raw_nC"] == pytest.approx((20.0 + 20.0 + 10.0 * 100 / 50) / 3)
    engine.accept(actor=OPERATOR)  # the stored evaluation uses accepted sets
    stored = evaluate_session(engine.store, session_id).results()
    assert stored["M_raw_nC"] == pytest.approx(after["M_raw_nC"])
    assert engine.store.readings(session_id)[-1].charge_nC == 10.0  # the raw value is kept


def test_the_audit_says_the_delivery_stopped_short_with_its_MU_and_reason():
    engine, session_id, short = _routine_with_a_short_delivery()
    engine.record_short_delivery(short.id, 50.0, "beam hold: door interlock", actor=OPERATOR)
    record = load_record(engine.store, session_id)
    event = next(e for e in record.audit() if e.kind == "delivery_short")
    assert event.actor == OPERATOR
    what, detail = event_words(record, event)
    assert what == "delivery stopped short"
    assert "50 MU delivered of 100 planned" in detail and "door interlock" in detail


@pytest.mark.parametrize(
    ("value", "field"),
    [(100.0, "actual_MU"), (120.0, "actual_MU"), (0.0, "actual_MU"), ("half", "actual_MU")],
)
def test_an_actual_MU_not_below_the_planned_is_refused_by_name(value, field):
    engine, _, short = _routine_with_a_short_delivery()
    with pytest.raises(InputError) as refused:
        engine.record_short_delivery(short.id, value, "interlock", actor=OPERATOR)
    assert refused.value.field == field
    assert "less than 100 MU" in str(refused.value)


def test_a_second_record_an_empty_reason_and_another_sessions_reading_are_refused():
    engine, _, short = _routine_with_a_short_delivery()
    with pytest.raises(InputError) as refused:
        engine.record_short_delivery(short.id, 50.0, "  ", actor=OPERATOR)
    assert refused.value.field == "reason"
    with pytest.raises(InputError) as refused:
        engine.record_short_delivery(short.id + 100, 50.0, "interlock", actor=OPERATOR)
    assert refused.value.field == "reading"
    engine.record_short_delivery(short.id, 50.0, "interlock", actor=OPERATOR)
    with pytest.raises(InputError, match="already recorded at 50 MU"):
        engine.record_short_delivery(short.id, 40.0, "interlock", actor=OPERATOR)


def test_a_short_delivery_needs_a_session_being_measured():
    engine, _ = make_engine()
    with pytest.raises(IllegalTransition):
        engine.record_short_delivery(1, 50.0, "interlock", actor=OPERATOR)


def test_the_setup_MU_per_reading_applies_to_every_compared_step_and_its_prompt():
    engine, _ = make_engine()
    engine.start_session(METADATA, "default", actor=OPERATOR, mu_per_reading=200)
    plan = engine.plan
    compared = [s for s in plan.steps if s.purpose in ("routine", "opposite", "reduced")]
    assert {s.mu_per_reading for s in compared} == {200.0}
    assert "Deliver 200 MU per reading" in compared[0].prompt
    shipped = load_plan("default")
    warmups = [s.mu_per_reading for s in plan.steps if s.purpose == "warmup"]
    assert warmups == [s.mu_per_reading for s in shipped.steps if s.purpose == "warmup"]
    event = next(
        e for e in engine.store.events(engine.session_id) if e.kind == "mu_per_reading_set"
    )
    assert event.detail() == {"plan_MU": 100.0, "mu_per_reading": 200.0}
    assert engine.store.session(engine.session_id).plan()["steps"][2]["mu_per_reading"] == 200.0


@pytest.mark.parametrize("value", [0, -5, 1e6, "many", True])
def test_a_setup_MU_per_reading_out_of_range_is_refused_by_name_and_no_session_opens(value):
    engine, _ = make_engine()
    with pytest.raises(InputError) as refused:
        engine.start_session(METADATA, "default", actor=OPERATOR, mu_per_reading=value)
    assert refused.value.field.endswith("mu_per_reading")
    assert engine.state is EngineState.IDLE
    assert engine.store.sessions() == []


def test_a_short_delivery_and_the_MU_chosen_are_logged_as_inputs_with_their_effects():
    """The input log (acquire/engine/inputs.py) holds the operator's short delivery and the
    MU per reading chosen at the start, so a replay feeds them back to the engine."""
    engine, session_id, short = _routine_with_a_short_delivery()
    refused_before = len(engine.store.inputs(session_id))
    with pytest.raises(InputError):
        engine.record_short_delivery(short.id, 150.0, "interlock", actor=OPERATOR)
    assert len(engine.store.inputs(session_id)) == refused_before  # a refusal logs nothing
    engine.record_short_delivery(short.id, 50.0, "beam hold: door interlock", actor=OPERATOR)
    logged = engine.store.inputs(session_id)[-1]
    assert (logged.kind, logged.actor) == ("short_delivery", OPERATOR)
    assert {k: logged.detail()[k] for k in ("reading", "actual_MU", "reason")} == {
        "reading": short.id,
        "actual_MU": 50.0,
        "reason": "beam hold: door interlock",
    }
    assert "reading.short_delivery" in engine.allowed()


def test_the_MU_per_reading_chosen_is_in_the_logged_session_start():
    engine, _clock = make_engine()
    session_id = engine.start_session(METADATA, "default", actor=OPERATOR, mu_per_reading=200)
    start = engine.store.inputs(session_id)[0]
    assert start.kind == "session_start" and start.detail()["mu_per_reading"] == 200.0
