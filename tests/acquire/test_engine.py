"""The sequence engine without I/O: a plain list-of-steps plan, an in-memory store, a hand clock.

Samples are fed as an integrating electrometer would send them while a beam is delivered (the
charge rises, then holds flat): common practice for end-of-beam capture. Factor check values are
the published formulas of docs/physics.md written out here, not the library's code.
"""

from __future__ import annotations

import pytest
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.engine import driver_commands, inputs
from chargebook.acquire.engine.engine import ConfirmationRequired, Engine
from chargebook.acquire.engine.states import IllegalTransition
from chargebook.acquire.protocol import EngineState, Method
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import Store
from chargebook.acquire.reports.audit import event_words
from chargebook.acquire.reports.data import load_record
from chargebook.acquire.session.plan import CaptureRule, Plan, SettlingRule, Step
from chargebook.corrections.errors import InputError
from chargebook.drivers_generic.interface import Capability

S = EngineState

#: The invented demo metadata (our own clinic, see acquire/commands/demo_data.py); demo only.
METADATA = demo_metadata()

CAPTURE = CaptureRule(hold_s=1.0)
ONE = SettlingRule(discard_first=1)


def small_plan(settling: SettlingRule = ONE, return_check: bool = False) -> Plan:
    """A plain list of steps: routine, opposite, reduced (and an optional return check)."""
    steps = [
        Step("routine", "routine", 1, 300.0, 3, 100.0, settling),
        Step("opposite", "opposite", -1, -300.0, 3, 100.0, settling),
        Step("reduced", "reduced", 1, 100.0, 3, 100.0, settling),
    ]
    if return_check:
        steps.append(Step("check", "return_check", 1, 300.0, 2, 100.0, optional=True))
    return Plan("small", tuple(steps), 300.0, 100.0, capture=CAPTURE)


class Clock:
    """A hand-driven clock in seconds."""

    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def make_engine(**kwargs) -> tuple[Engine, Clock]:
    clock = Clock()
    caps = kwargs.pop(
        "capabilities", {Capability.ZERO, Capability.INTEGRATE, Capability.READ_CHARGE}
    )
    engine = Engine(Store.memory(), capabilities=caps, clock=clock, **kwargs)
    return engine, clock


def deliver(engine: Engine, clock: Clock, charge_nC: float) -> None:
    """Feed one beam delivery: rise to charge_nC over 1 s, then flat until end of beam."""
    assert engine.reading is not None, f"no reading armed in state {engine.state}"
    for i in range(1, 11):
        clock.now += 0.1
        engine.on_sample(clock.now, charge_nC * i / 10)
    reading = engine.reading
    while engine.reading is reading:
        clock.now += 0.1
        engine.on_sample(clock.now, charge_nC)


def started(engine: Engine, plan: Plan | None = None) -> int:
    session_id = engine.start_session(METADATA, plan or small_plan(), actor="operator A")
    engine.set_environment(20.0, 101.325, actor="operator A")
    return session_id


def take_set(engine: Engine, clock: Clock, charges: list[float]) -> None:
    if engine.pending_manual is not None:
        engine.manual_done(actor="operator A")
    engine.arm()
    for charge in charges:
        deliver(engine, clock, charge)


def into_opposite_set(engine: Engine, clock: Clock, charges: list[float]) -> None:
    """Take and accept the routine set, then start the opposite set with ``charges``."""
    take_set(engine, clock, [20.5, 20.0, 20.0, 20.0])
    engine.accept()
    take_set(engine, clock, charges)


def test_a_plan_runs_from_start_to_finish_with_settling_readings_kept_but_not_used():
    engine, clock = make_engine()
    session_id = started(engine)
    routine = [20.50, 20.00, 20.01, 19.99]  # first is the settling reading
    opposite = [-20.30, -20.04, -20.05, -20.03]
    reduced = [19.95, 19.90, 19.91, 19.89]
    for charges in (routine, opposite, reduced):
        take_set(engine, clock, charges)
        assert engine.state is S.REVIEWING
        engine.accept()
    assert engine.state is S.FINISHED
    store = engine.store
    assert store.session(session_id).status == "finished"
    readings = store.readings(session_id)
    assert len(readings) == 12
    assert [r.settling for r in readings].count(True) == 3
    results, provisional, error = engine.results()
    assert error is None and not provisional
    # TRS-398: k_pol = (|M+| + |M-|) / (2 |M|), M the routine-polarity reading (docs/physics.md).
    m_plus, m_minus = sum(routine[1:]) / 3, sum(opposite[1:]) / 3
    assert results["k_pol"] == pytest.approx((abs(m_plus) + abs(m_minus)) / (2 * abs(m_plus)))
    assert results["M_raw_nC"] == pytest.approx(m_plus)
    assert results["factor_states"]["k_s"] == "measured"
    assert results["dose_Gy"] is not None


def test_factors_not_yet_measured_are_pending_and_the_dose_waits_for_them():
    engine, clock = make_engine()
    started(engine)
    take_set(engine, clock, [20.5, 20.0, 20.0, 20.0])
    snapshot = engine.snapshot()
    assert snapshot["results_provisional"] is True  # the routine set is not accepted yet
    engine.accept()
    results = engine.snapshot()["results"]
    assert results["factor_states"]["k_pol"] == "pending"
    assert results["factor_states"]["k_s"] == "pending"
    assert results["k_pol"] is None and results["dose_Gy"] is None


def test_an_illegal_request_names_the_state_and_what_is_allowed():
    engine, _ = make_engine()
    with pytest.raises(IllegalTransition) as refused:
        engine.accept()
    assert "idle" in str(refused.value) and "session.start" in str(refused.value)
    started(engine)
    with pytest.raises(IllegalTransition, match=r"waiting for operator.*allowed now"):
        engine.accept()


def test_arming_waits_for_the_environment_and_for_the_manual_bias_step():
    engine, _ = make_engine()
    engine.start_session(METADATA, small_plan())
    assert Method.STEP_ARM not in engine.allowed()
    with pytest.raises(IllegalTransition, match="temperature and pressure"):
        engine.arm()
    engine.set_environment(21.0, 1013.0, "hPa")
    # The profile cannot set the bias: the operator turns the switch by hand first.
    assert engine.snapshot()["prompt"]["kind"] == "manual"
    with pytest.raises(IllegalTransition, match="manual step"):
        engine.arm()
    engine.manual_done(note="switch at +300 V", actor="operator A")
    assert Method.STEP_ARM in engine.allowed()
    recorded = engine.store.events(engine.session_id)
    events = [e for e in recorded if e.kind == EventKind.MANUAL_STEP_DONE]
    assert events[0].actor == "operator A" and events[0].detail()["by_hand"] is True


def test_bad_environment_is_refused_naming_the_field_and_loses_nothing():
    engine, _ = make_engine()
    session_id = started(engine)
    for args, field in (
        ((80.0, 101.3), "temperature_C"),  # 10–40 °C (common practice)
        ((21.0, 20.0), "pressure"),  # 60–110 kPa (common practice), named as passed
        (("warm", 101.3), "temperature_C"),
    ):
        with pytest.raises(InputError) as refused:
            engine.set_environment(*args)
        assert refused.value.field == field
    entries = engine.store.environment(session_id)
    assert len(entries) == 1 and entries[0].temperature_C == 20.0


def test_redo_keeps_the_old_set_superseded_with_its_reason():
    engine, clock = make_engine()
    session_id = started(engine)
    take_set(engine, clock, [20.5, 20.0, 23.0, 20.0])
    engine.redo("spike on reading 3")
    assert engine.state is S.WAITING_FOR_OPERATOR
    take_set(engine, clock, [20.5, 20.0, 20.0, 20.0])
    sets = engine.store.sets(session_id)
    assert [(s.attempt, s.status) for s in sets] == [(1, "superseded"), (2, "reviewing")]
    assert sets[0].reason == "spike on reading 3"
    assert len(engine.store.readings(session_id, sets[0].id)) == 4  # kept
    with pytest.raises(InputError, match="reason"):
        engine.redo("   ")


def test_pause_drops_the_reading_in_progress_and_resume_arms_again():
    engine, clock = make_engine()
    started(engine)
    engine.manual_done()
    engine.arm()
    engine.on_sample(clock.now + 0.1, 5.0)
    engine.take_commands()
    engine.pause()
    assert engine.state is S.PAUSED and engine.reading is None
    assert driver_commands.StopIntegration() in engine.take_commands()
    engine.resume()
    assert engine.state is S.SETTLING and engine.reading is not None
    assert engine.take_commands()[-1] == driver_commands.StartIntegration()
    kinds = [e.kind for e in engine.store.events(engine.session_id)]
    assert EventKind.READING_DROPPED in kinds


def test_a_reading_dropped_by_a_pause_is_said_until_a_reading_is_recorded():
    engine, clock = make_engine()
    started(engine)
    engine.manual_done()
    engine.arm()
    engine.on_sample(clock.now + 0.1, 0.0)
    engine.on_sample(clock.now + 0.2, 5.0)  # the beam is on: charge rising
    engine.pause()
    notice = engine.snapshot()["notice"]
    assert notice is not None and "+5.0000 nC so far" in notice
    assert "discarded because the session was paused" in notice
    assert "Deliver that beam again" in notice
    engine.resume()
    assert engine.snapshot()["notice"] == notice  # still said after resuming
    deliver(engine, clock, 20.1)  # the settling reading, delivered again
    assert engine.snapshot()["notice"] is None


def test_a_pause_before_any_beam_says_no_beam_was_seen():
    engine, _clock = make_engine()
    started(engine)
    engine.manual_done()
    engine.arm()
    engine.pause()
    assert engine.snapshot()["notice"] == (
        "The armed reading was cancelled because the session was paused; no beam had been seen."
    )


def test_stop_and_abort_are_distinct_and_keep_everything():
    engine, clock = make_engine()
    session_id = started(engine)
    into_opposite_set(engine, clock, [-20.3])
    with pytest.raises(ConfirmationRequired):
        engine.abort("chamber cable damaged")
    engine.abort("chamber cable damaged", confirm=True)
    assert engine.state is S.ABORTED
    store = engine.store
    assert store.session(session_id).status == "aborted"
    assert [s.status for s in store.sets(session_id)] == ["accepted", "aborted"]
    assert len(store.readings(session_id)) == 5
    engine.close()
    second = started(engine)
    take_set(engine, clock, [20.5, 20.0, 20.0, 20.0])
    engine.accept()
    engine.stop("only the routine output was needed today")
    assert store.session(second).status == "finished"
    assert engine.state is S.FINISHED


def test_instrument_lost_mid_set_interrupts_it_and_the_set_can_be_continued():
    engine, clock = make_engine()
    session_id = started(engine)
    take_set(engine, clock, [20.5, 20.0])
    engine.instrument_lost("the serial port went away")
    assert engine.state is S.INTERRUPTED
    assert Method.STEP_ARM not in engine.allowed()  # not while it is away
    assert engine.store.sets(session_id)[0].status == "interrupted"
    engine.instrument_back("SIM-EM-0001")
    engine.arm()  # continue the same set
    deliver(engine, clock, 20.01)
    deliver(engine, clock, 19.99)
    assert engine.state is S.REVIEWING
    sets = engine.store.sets(session_id)
    assert len(sets) == 1 and len(engine.store.readings(session_id, sets[0].id)) == 4


def test_a_restarted_engine_resumes_the_open_session_with_every_reading():
    engine, clock = make_engine()
    session_id = started(engine)
    into_opposite_set(engine, clock, [-20.3, -20.0])
    # The daemon dies here; a new engine opens the same store.
    revived = Engine(engine.store, capabilities=engine.capabilities, clock=clock)
    assert revived.restore() is True
    assert revived.session_id == session_id and revived.state is S.INTERRUPTED
    assert revived.step.key == "opposite" and revived.bias_V == -300.0
    assert len(revived.active.readings) == 2
    assert engine.store.sets(session_id)[1].status == "interrupted"
    revived.arm()
    deliver(revived, clock, -20.01)
    deliver(revived, clock, -19.99)
    assert revived.state is S.REVIEWING
    assert len(engine.store.readings(session_id)) == 8


def test_remote_bias_and_the_bench_turn_prompts_into_commands():
    engine, _clock = make_engine(
        capabilities={Capability.ZERO, Capability.INTEGRATE, Capability.SET_BIAS}, bench=True
    )
    started(engine)
    assert engine.pending_manual is None
    engine.arm()
    assert engine.take_commands() == [
        driver_commands.SetBias(bias_V=300.0),
        driver_commands.Zero(),
        driver_commands.StartIntegration(),
        driver_commands.DeliverBeam(monitor_units=100.0),
    ]


def test_manual_bias_confirmed_with_a_bench_turns_the_simulated_switch():
    engine, _ = make_engine(bench=True)
    started(engine)
    engine.manual_done()
    assert engine.take_commands() == [driver_commands.TurnBiasSwitch(bias_V=300.0)]


def test_settling_until_stable_keeps_taking_settling_readings():
    rule = SettlingRule(until_stable_pct=0.1, max_settling_readings=5)
    engine, clock = make_engine()
    session_id = started(engine, small_plan(settling=rule))
    take_set(engine, clock, [21.0, 20.4, 20.01, 20.0, 20.0, 20.0, 20.0])
    flags = [r.settling for r in engine.store.readings(session_id)]
    assert flags == [True, True, True, True, False, False, False]


def test_only_an_optional_step_can_be_skipped():
    engine, clock = make_engine()
    session_id = started(engine, small_plan(return_check=True))
    with pytest.raises(IllegalTransition, match="optional"):
        engine.skip()
    for charges in ([20.5, 20, 20, 20], [-20.3, -20, -20, -20], [19.95, 19.9, 19.9, 19.9]):
        take_set(engine, clock, charges)
        engine.accept()
    engine.skip()
    assert engine.state is S.FINISHED
    assert engine.snapshot()["plan"][3]["status"] == "skipped"
    assert engine.store.session(session_id).status == "finished"


def test_a_capture_before_any_charge_is_refused_saying_so():
    engine, clock = make_engine(capabilities={Capability.PUSH_READINGS, Capability.STREAM})
    started(engine)
    engine.manual_done()
    engine.arm()  # armed: the electrometer has sent nothing yet
    with pytest.raises(IllegalTransition, match="the reading in progress has no charge yet"):
        engine.capture()
    engine.on_sample(clock.now + 1, 12.0)
    engine.capture()
    assert [r.charge_nC for r in engine.store.readings(engine.session_id)] == [12.0]


def test_manual_and_pushed_capture():
    engine, clock = make_engine(
        capabilities={Capability.PUSH_READINGS, Capability.STREAM}, default_plan=small_plan()
    )
    session_id = started(engine)
    engine.manual_done()
    engine.arm()
    engine.on_sample(clock.now + 1, 20.4, complete=True)
    engine.on_sample(clock.now + 2, 12.0)
    engine.capture()
    captures = [r.capture for r in engine.store.readings(session_id)]
    assert captures == ["pushed", "manual"]


def test_snapshot_lists_the_allowed_actions_and_the_whole_plan():
    engine, _clock = make_engine()
    snapshot = engine.snapshot()
    assert snapshot["state"] == "idle" and snapshot["allowed"] == ["session.start"]
    started(engine)
    engine.manual_done()
    engine.arm()
    snapshot = engine.snapshot()
    assert snapshot["state"] == "settling"
    assert set(snapshot["allowed"]) >= {"session.pause", "set.redo", "session.abort"}
    assert [step["status"] for step in snapshot["plan"]] == ["current", "pending", "pending"]
    assert snapshot["prompt"]["kind"] == "deliver_beam"


def test_thresholds_are_settings_recorded_with_the_session_and_restored():
    from chargebook.corrections.stability import Thresholds

    strict = Thresholds(relative_sd_pct=0.01)  # a physicist's own, tighter limit
    engine, clock = make_engine(thresholds=strict)
    session_id = started(engine)
    take_set(engine, clock, [20.5, 20.00, 20.02, 19.98])  # relative SD 0.1 %
    codes = {flag["code"] for flag in engine.snapshot()["current_set"]["flags"]}
    assert "routine_sd_high" in codes
    relaxed, _ = make_engine()
    relaxed_session = started(relaxed)
    take_set(relaxed, relaxed.clock, [20.5, 20.00, 20.02, 19.98])
    assert relaxed.store.session(relaxed_session).status == "open"
    assert "routine_sd_high" not in {f["code"] for f in relaxed.snapshot()["current_set"]["flags"]}
    revived = Engine(engine.store, clock=clock)
    revived.restore()
    assert revived.session_id == session_id and revived.thresholds == strict


def test_a_reading_whose_sign_contradicts_its_set_is_flagged():
    engine, clock = make_engine()
    started(engine)
    take_set(engine, clock, [20.5, 20.0, -20.0, 20.1])  # the cable or switch misbehaved once
    readings = engine.snapshot()["current_set"]["readings"]
    signs = [("sign_against_bias" in {f["code"] for f in r["flags"]}) for r in readings]
    assert signs == [False, False, True, False]


def test_a_refused_command_interrupts_the_set_but_it_can_go_on_at_once():
    engine, clock = make_engine()
    started(engine)
    take_set(engine, clock, [20.5])
    engine.instrument_lost("the electrometer refused 'start'", still_connected=True)
    snapshot = engine.snapshot()
    assert snapshot["state"] == "interrupted"
    assert snapshot["instrument"]["message"] == "the electrometer refused 'start'"
    assert {"step.arm", "set.redo"} <= set(snapshot["allowed"])
    engine.arm()
    assert engine.snapshot()["instrument"]["message"] is None
    kinds = [e.kind for e in engine.store.events(engine.session_id)]
    assert EventKind.INSTRUMENT_FAULT in kinds


BENCH_WORDS = "the bench refused to deliver 100 MU: a beam is already on; wait for it to end"


def test_a_bench_refusal_interrupts_the_set_in_its_own_words_and_leaves_the_electrometer_be():
    engine, clock = make_engine()
    session_id = started(engine)
    take_set(engine, clock, [20.5])  # one reading taken, the next armed
    assert engine.reading is not None
    engine.apply(inputs.BenchRefused(message=BENCH_WORDS))
    snapshot = engine.snapshot()
    assert snapshot["state"] == "interrupted"
    assert snapshot["instrument"]["connected"] and snapshot["instrument"]["message"] is None
    assert snapshot["notice"].startswith(
        f"The beam of reading 2 could not be started: {BENCH_WORDS}"
    )
    events = engine.store.events(session_id)
    kinds = [e.kind for e in events]
    assert EventKind.INSTRUMENT_FAULT not in kinds and EventKind.INSTRUMENT_LOST not in kinds
    assert kinds[-4:] == [
        EventKind.BENCH_REFUSED,
        EventKind.READING_DROPPED,
        EventKind.SET_STATUS,
        EventKind.STATE_CHANGED,
    ]
    refused, dropped, status, changed = (e.detail() for e in events[-4:])
    assert refused == {"message": BENCH_WORDS, "set_id": status["set_id"], "reading_number": 2}
    assert dropped["why"] == "bench refused" and status["reason"] == BENCH_WORDS
    assert changed["action"] == "bench refused"
    record = load_record(engine.store, session_id)
    bench = next(e for e in record.audit() if e.kind == EventKind.BENCH_REFUSED)
    what, detail = event_words(record, bench)
    assert (what, detail) == (
        "the bench refused",
        f"the beam of reading 2 of set {status['set_id']}: {BENCH_WORDS}",
    )
    engine.arm()  # the set goes on: its reading is kept
    assert engine.state is EngineState.COLLECTING
    assert len(engine.store.readings(session_id)) == 1


def test_a_bench_refusal_between_sets_is_said_and_interrupts_nothing():
    engine, _clock = make_engine()
    started(engine)
    engine.apply(inputs.BenchRefused(message="the bench refused to set the bias to +300 V: busy"))
    snapshot = engine.snapshot()
    assert snapshot["state"] == "waiting_for_operator"
    assert (
        snapshot["notice"]
        == "The bench refused: the bench refused to set the bias to +300 V: busy."
    )


def test_a_set_whose_readings_average_zero_leaves_the_snapshot_standing():
    # Display never raises: set statistics that cannot be formed are a flag in the snapshot.
    engine, clock = make_engine()
    started(engine)
    take_set(engine, clock, [20.5, 2.0, -2.0])  # first is the settling reading
    snapshot = engine.snapshot()
    current = snapshot["current_set"]
    assert current["stats"] is None
    assert "statistics_unavailable" in [flag["code"] for flag in current["flags"]]


def test_a_capture_whose_commit_fails_changes_nothing_and_is_taken_again_once_it_can():
    # a real SQLite refusal to write (the connection made read-only), not a mock
    engine, clock = make_engine()
    started(engine)
    engine.manual_done(actor="operator A")
    engine.arm()
    for i in range(1, 11):  # the beam: the charge rises to 20 nC, then holds
        clock.now += 0.1
        engine.on_sample(clock.now, 2.0 * i)
    state, commands, seq = engine.state, list(engine._commands), engine.seq
    engine.store.db.execute("PRAGMA query_only = 1")
    clock.now += 1.1  # past the hold time: this sample ends the reading
    with pytest.raises(Exception, match="readonly"):
        engine.on_sample(clock.now, 20.0)
    assert engine.state is state and engine._commands == commands and engine.seq == seq
    assert engine.reading is not None and engine.active.readings == []
    engine.set_record_fault("record not writable: the database file is read-only")
    snapshot = engine.snapshot()
    assert snapshot["record"] == {
        "writable": False,
        "message": "record not writable: the database file is read-only",
    }
    assert snapshot["allowed"] == [] and snapshot["prompt"]["kind"] == "record_fault"
    engine.store.db.execute("PRAGMA query_only = 0")
    engine.set_record_fault(None)
    engine.on_sample(clock.now, 20.0)  # the same sample, fed again
    assert [r.charge_nC for r in engine.active.readings] == [20.0]
    assert len(engine.store.readings(engine.session_id)) == 1


def test_the_drivers_note_on_late_answers_is_the_instruments_message():
    engine, _ = make_engine()
    engine.set_reply_note("answers are slow: 3 of the last 3 took over 0.5 s")
    assert engine.snapshot()["instrument"]["message"] == (
        "answers are slow: 3 of the last 3 took over 0.5 s"
    )
    engine.set_reply_note(None)
    assert engine.snapshot()["instrument"]["message"] is None


def _set_flag_codes(engine: Engine, purpose: str) -> list[str]:
    entry = next(s for s in engine.snapshot()["sets"] if s["purpose"] == purpose)
    return [flag["code"] for flag in entry["flags"]]


def test_readings_integrated_faster_than_their_mu_can_be_delivered_are_flagged():
    # each delivery here lasts about 2.1 s on the clock; 100 MU need 2.5 s even at the highest
    # clinical dose rate (about 2400 MU/min, from memory)
    engine, clock = make_engine()
    started(engine)
    take_set(engine, clock, [20.5, 20.0, 20.0, 20.0])
    assert "routine_integration_too_short" in _set_flag_codes(engine, "routine")
    # the same deliveries at a daemon time scale of 0.1 stand for 21 s each: no flag
    engine, clock = make_engine(time_scale=0.1)
    started(engine)
    take_set(engine, clock, [20.5, 20.0, 20.0, 20.0])
    assert "routine_integration_too_short" not in _set_flag_codes(engine, "routine")


def test_a_set_with_half_the_routine_sets_charge_per_mu_is_flagged():
    engine, clock = make_engine(time_scale=0.1)
    started(engine)
    into_opposite_set(engine, clock, [-10.3, -10.0, -10.01, -10.0])  # 100 MU each, half charge
    assert "opposite_charge_per_MU" in _set_flag_codes(engine, "opposite")
    engine, clock = make_engine(time_scale=0.1)
    started(engine)
    into_opposite_set(engine, clock, [-20.3, -20.0, -20.01, -20.0])
    assert "opposite_charge_per_MU" not in _set_flag_codes(engine, "opposite")


def test_the_readings_list_flags_exactly_the_reading_the_results_refuse():
    # A tie among the readings used for results (two of each sign) once showed no sign flag in
    # the readings list while the results said a reading contradicted the bias: one rule now.
    engine, clock = make_engine()
    started(engine)
    plan_steps = engine.plan.steps
    assert plan_steps[0].readings == 3
    take_set(engine, clock, [-20.5, 20.0, -20.0, 20.0])  # first is the settling reading
    snapshot = engine.snapshot()
    flagged = [
        reading["charge_nC"]
        for reading in snapshot["current_set"]["readings"]
        if "sign_against_bias" in {f["code"] for f in reading["flags"]}
    ]
    assert flagged == [-20.5, -20.0]
    results, _, error = engine.results()
    assert results is None
    assert "routine_nC[1]" in error and "contradicts the bias" in error  # the -20.0 reading


def test_a_reading_names_the_raw_line_of_the_sample_it_was_taken_at():
    # The daemon passes each sample's raw line (its row id); the reading keeps it, found by
    # no lookup of the sample's time (two of these lines share one receive time).
    engine, clock = make_engine(capabilities={Capability.PUSH_READINGS, Capability.STREAM})
    session_id = started(engine)
    engine.manual_done()
    engine.arm()
    t_s = clock.now + 1

    def line(text: str) -> int:
        return engine.store.add_traffic(session_id, t_s, "rx", text.encode() + b"\r\n")

    stale, pushed, moving, stale_again = (line(f"line {n}") for n in range(4))
    engine.on_sample(clock.now - 5.0, 3.0, line_id=stale)  # received before arming
    engine.on_sample(t_s, 20.4, complete=True, line_id=pushed)
    engine.on_sample(t_s, 12.0, line_id=moving)
    engine.on_sample(clock.now - 5.0, 3.0, line_id=stale_again)  # stale: not the latest
    engine.capture()
    assert [r.traffic_id for r in engine.store.readings(session_id)] == [pushed, moving]
