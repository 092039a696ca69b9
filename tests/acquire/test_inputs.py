"""The input log: every input that changed a session is one record, logged with its effects.

On real SQLite files: the log is read back with the store's API and applied again, with
``Engine.apply``, to a new engine on a new file, which must come out with the same record.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest
from chargebook.acquire.engine import inputs
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.engine.states import IllegalTransition
from chargebook.acquire.protocol import EngineState, Method
from chargebook.acquire.record.store import Store
from chargebook.acquire.record.verify import verify_session
from chargebook.acquire.session.plan import Plan, SettlingRule, Step
from chargebook.drivers_generic.interface import Capability

from tests.acquire.test_engine import CAPTURE, METADATA, Clock, deliver, small_plan

S = EngineState
OPERATOR = "operator A"
CAPS = {Capability.ZERO, Capability.INTEGRATE, Capability.READ_CHARGE}


def file_engine(path: Path, clock: Clock) -> Engine:
    return Engine(Store.open(path), capabilities=CAPS, clock=clock)


def record_every_kind(engine: Engine, clock: Clock) -> int:
    """Run a session through every operator action and instrument input; return its id."""
    session_id = engine.start_session(METADATA, small_plan(return_check=True), actor=OPERATOR)
    engine.set_environment(20.0, 101.325, "kPa", 45.0, "barometer", actor=OPERATOR)
    engine.manual_done("bias switch turned", actor=OPERATOR)
    engine.arm(actor=OPERATOR)
    for charge in (20.5, 20.0, 23.0, 20.0):
        deliver(engine, clock, charge)
    engine.redo("spike on reading 3", actor=OPERATOR)
    engine.arm(actor=OPERATOR)
    clock.now += 0.1
    engine.on_sample(clock.now, 5.0)
    engine.capture(actor=OPERATOR)  # a settling reading taken by hand
    deliver(engine, clock, 20.0)
    engine.pause(actor=OPERATOR)
    engine.resume(actor=OPERATOR)
    engine.instrument_lost("the serial port went away")
    engine.instrument_back("SIM-EM-0001")
    engine.arm(actor=OPERATOR)  # continue the interrupted set
    for charge in (20.0, 20.0):
        deliver(engine, clock, charge)
    engine.accept(actor=OPERATOR)
    engine.manual_done(actor=OPERATOR)
    engine.arm(actor=OPERATOR)
    clock.now += 0.1
    engine.on_sample(clock.now, -3.0)
    engine.abort("chamber cable damaged", True, actor=OPERATOR)
    engine.close(actor=OPERATOR)
    return session_id


def replay_log(store: Store, session_id: int, path: Path, caps: set = CAPS) -> Engine:
    """Apply the session's logged inputs, in order, to a new engine on a new file (a new
    engine for a logged restart, as a daemon started again)."""
    engine = Engine(Store.open(path), capabilities=caps, clock=lambda: float("nan"))
    for row in store.inputs(session_id):
        given = inputs.from_logged(row.kind, row.actor, row.detail())
        if isinstance(given, inputs.Restart):
            engine = Engine(engine.store, capabilities=caps, clock=lambda: float("nan"))
        engine.apply(given)
    return engine


def facts(store: Store, session_id: int) -> tuple[list, list, list]:
    """Return the session's readings, sets and events, less what the wall clock stamps."""
    readings = [(r.set_id, r.seq, r.t_s, r.charge_nC, r.capture, r.settling) for r in
                store.readings(session_id)]  # fmt: skip
    sets = [(s.step_key, s.attempt, s.status, s.reason) for s in store.sets(session_id)]
    events = [(e.kind, e.actor, e.detail()) for e in store.events(session_id)]
    for _, _, detail in events:
        for stamped in ("uuid", "ended_at", "closed_at", "pid"):  # random or the wall clock's
            detail.pop(stamped, None)
    return readings, sets, events


def test_every_input_is_logged_in_order_with_its_parameters_and_actor(tmp_path: Path) -> None:
    clock = Clock()
    engine = file_engine(tmp_path / "station.sqlite", clock)
    session_id = record_every_kind(engine, clock)
    logged = engine.store.inputs(session_id)
    actions = [row.kind for row in logged if row.kind != "sample"]
    assert actions == [
        "session_start", "environment", "manual_done", "arm", "redo", "arm", "capture",
        "pause", "resume", "instrument_lost", "instrument_back", "arm", "accept",
        "manual_done", "arm", "abort", "close",
    ]  # fmt: skip
    by_kind = {row.kind: row for row in logged}
    assert by_kind["redo"].actor == OPERATOR
    assert by_kind["redo"].detail()["reason"] == "spike on reading 3"
    assert by_kind["environment"].detail() | {"clock_s": 0} == {
        "temperature_C": 20.0, "pressure": 101.325, "pressure_unit": "kPa",
        "humidity_pct": 45.0, "source": "barometer", "clock_s": 0,
    }  # fmt: skip
    assert by_kind["abort"].detail()["confirm"] is True
    assert by_kind["instrument_lost"].actor == "daemon"
    # every reading is taken at a logged sample: its time and charge are the sample's
    samples = {(r.detail()["t_s"], r.detail()["charge_nC"]) for r in logged if r.kind == "sample"}
    readings = engine.store.readings(session_id)
    assert readings and all((r.t_s, r.charge_nC) in samples for r in readings)
    # the log is chained like every appended row
    assert verify_session(engine.store, session_id).verified
    engine.store.close()


def test_the_logged_inputs_applied_again_give_the_same_record(tmp_path: Path) -> None:
    clock = Clock()
    engine = file_engine(tmp_path / "station.sqlite", clock)
    session_id = record_every_kind(engine, clock)
    again = replay_log(engine.store, session_id, tmp_path / "again.sqlite")

    assert facts(again.store, session_id) == facts(engine.store, session_id)
    assert again.store.session(session_id).status == "aborted"
    assert [r.kind for r in again.store.inputs(session_id)] == [
        r.kind for r in engine.store.inputs(session_id)
    ]
    engine.store.close()
    again.store.close()


def test_a_refused_or_failed_input_logs_nothing(tmp_path: Path) -> None:
    clock = Clock()
    engine = file_engine(tmp_path / "station.sqlite", clock)
    session_id = engine.start_session(METADATA, small_plan(), actor=OPERATOR)
    before = len(engine.store.inputs(session_id))
    with pytest.raises(IllegalTransition):
        engine.accept(actor=OPERATOR)  # nothing to accept
    engine.store.db.execute(
        "CREATE TEMP TRIGGER refuse_env BEFORE INSERT ON events "
        "WHEN NEW.kind = 'environment_entered' BEGIN SELECT RAISE(ABORT, 'disk refused'); END"
    )
    with pytest.raises(sqlite3.DatabaseError, match="disk refused"):
        engine.set_environment(20.0, 101.325, actor=OPERATOR)
    assert len(engine.store.inputs(session_id)) == before
    assert engine.store.environment(session_id) == []
    engine.store.close()


def test_samples_that_only_move_the_charge_are_logged_with_the_next_input(tmp_path: Path) -> None:
    clock = Clock()
    engine = file_engine(tmp_path / "station.sqlite", clock)
    session_id = engine.start_session(METADATA, small_plan(), actor=OPERATOR)
    engine.set_environment(20.0, 101.325, actor=OPERATOR)
    engine.manual_done(actor=OPERATOR)
    engine.arm(actor=OPERATOR)
    logged = len(engine.store.inputs(session_id))
    for charge in (1.0, 2.0, 3.0):
        clock.now += 0.1
        engine.on_sample(clock.now, charge, line_id=None)
    assert len(engine.store.inputs(session_id)) == logged  # nothing written yet
    engine.pause(actor=OPERATOR)
    kinds = [r.kind for r in engine.store.inputs(session_id)[logged:]]
    assert kinds == ["sample", "sample", "sample", "pause"]
    engine.store.close()


@pytest.mark.parametrize(
    "statement",
    [
        "UPDATE inputs SET actor = 'someone else'",
        "DELETE FROM inputs",
        "INSERT OR REPLACE INTO inputs (id, recorded_at, kind, actor, detail_json, chain_seq, "
        "chain_hash) VALUES (1, 'x', 'arm', 'x', '{}', 1, 'x')",
        "INSERT INTO inputs (id, recorded_at, kind, actor, detail_json) "
        "VALUES (999, 'x', 'arm', 'x', '{}')",
    ],
)
def test_the_input_log_is_append_only_for_any_connection(tmp_path: Path, statement: str) -> None:
    path = tmp_path / "station.sqlite"
    engine = file_engine(path, Clock())
    engine.start_session(METADATA, small_plan(), actor=OPERATOR)
    engine.store.close()
    with sqlite3.connect(path) as other, pytest.raises(sqlite3.DatabaseError, match="inputs"):
        other.execute(statement)


def test_an_edited_input_breaks_the_chain_and_verify_names_it(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    engine = file_engine(path, Clock())
    session_id = engine.start_session(METADATA, small_plan(), actor=OPERATOR)
    engine.store.close()
    other = sqlite3.connect(path)
    other.execute("DROP TRIGGER inputs_refuse_update")
    other.execute("UPDATE inputs SET actor = 'someone else'")
    other.commit()
    other.close()
    with Store.open(path) as store:
        report = verify_session(store, session_id)
    assert not report.verified
    assert [p.table for p in report.problems] == ["inputs"]


def test_a_request_becomes_its_input_and_a_logged_row_the_same_input_again() -> None:
    params = {"reason": "spike", "confirm": True}
    given = inputs.from_request(Method.SESSION_ABORT, params, OPERATOR)
    assert given == inputs.Abort(reason="spike", confirm=True, actor=OPERATOR)
    assert inputs.from_logged(given.kind, given.actor, given.fields()) == given
    with pytest.raises(ValueError, match="unknown kind 'teleport'"):
        inputs.from_logged("teleport", OPERATOR, {})
    # every operator action of the protocol has its input; environment.read is the daemon
    # reading its sensor, which it then applies as an environment entry (that input is logged)
    actions = {m for m in Method if m.startswith(("session.", "step.", "reading.", "set.", "env"))}
    assert set(inputs.BY_METHOD) == actions - {Method.SESSION_REVIEW, Method.ENVIRONMENT_READ}


def test_a_settling_wait_a_restart_a_skip_and_a_stop_apply_again_from_the_log(
    tmp_path: Path,
) -> None:
    waits = SettlingRule(wait_s=5.0)
    steps = (
        Step("routine", "routine", 1, 300.0, 1, 100.0, waits),
        Step("check", "return_check", 1, 300.0, 1, 100.0, optional=True),
        Step("reduced", "reduced", 1, 100.0, 1, 100.0),
    )
    plan = Plan("waits", steps, 300.0, 100.0, capture=CAPTURE)
    clock = Clock()
    path = tmp_path / "station.sqlite"
    caps = {Capability.SET_BIAS, *CAPS}
    engine = Engine(Store.open(path), capabilities=caps, clock=clock)
    session_id = engine.start_session(METADATA, plan, actor=OPERATOR)
    engine.set_environment(20.0, 101.325, actor=OPERATOR)
    engine.arm(actor=OPERATOR)
    clock.now += 1.0
    engine.tick()  # the wait goes on: not an input
    clock.now += 5.0
    engine.tick()  # the wait is over: the reading is armed at this clock
    clock.now += 0.1
    engine.on_sample(clock.now, 2.0)
    engine.store.close()  # the daemon dies here, with a reading under way
    revived = Engine(Store.open(path), capabilities=caps, clock=clock)
    assert revived.restore() is True and revived.state is S.INTERRUPTED
    revived.arm(actor=OPERATOR)  # continue the interrupted set: no wait, the bias is set
    clock.now += 6.0
    revived.tick()  # no wait to end: not an input
    deliver(revived, clock, 20.0)
    revived.accept(actor=OPERATOR)
    revived.skip(actor=OPERATOR)
    revived.stop("only the routine output was needed", actor=OPERATOR)
    logged = revived.store.inputs(session_id)
    kinds = [row.kind for row in logged if row.kind != "sample"]
    assert kinds == [
        "session_start", "environment", "arm", "tick", "restart", "arm", "accept", "skip",
        "stop",
    ]  # fmt: skip
    ticks = [row.detail()["clock_s"] for row in logged if row.kind == "tick"]
    assert ticks == [1006.0]
    # the sample taken before the crash died with it; the log holds what the record holds
    again = replay_log(revived.store, session_id, tmp_path / "again.sqlite", caps)
    assert facts(again.store, session_id) == facts(revived.store, session_id)
    assert again.store.session(session_id).status == "finished"
    revived.store.close()
    again.store.close()


def test_a_bench_refusal_is_logged_and_applies_again_from_the_log(tmp_path: Path) -> None:
    clock = Clock()
    engine = file_engine(tmp_path / "station.sqlite", clock)
    session_id = engine.start_session(METADATA, small_plan(), actor=OPERATOR)
    engine.set_environment(20.0, 101.325, actor=OPERATOR)
    if engine.pending_manual is not None:
        engine.manual_done(actor=OPERATOR)
    engine.arm(actor=OPERATOR)
    deliver(engine, clock, 20.5)
    engine.apply(inputs.BenchRefused(message="the bench refused to deliver 100 MU: busy"))
    engine.arm(actor=OPERATOR)  # continue the interrupted set
    deliver(engine, clock, 20.0)
    logged = [row for row in engine.store.inputs(session_id) if row.kind == "bench_refused"]
    assert [(row.actor, row.detail()["message"]) for row in logged] == [
        ("daemon", "the bench refused to deliver 100 MU: busy")
    ]
    again = replay_log(engine.store, session_id, tmp_path / "again.sqlite")
    assert facts(again.store, session_id) == facts(engine.store, session_id)
    assert "bench_refused" in [kind for kind, _, _ in facts(again.store, session_id)[2]]
    engine.store.close()
    again.store.close()
