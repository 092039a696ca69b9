"""One transaction per input: every operator action and every instrument-driven change commits
all of its rows (set status, events, readings) at once, or none of them.

On a real SQLite file: SQLite's own statement trace (``Connection.set_trace_callback``) counts
the COMMITs each input causes, and a real SQLite trigger makes a write fail part-way through an
action to show that nothing of it stays, in the record or in the engine.
"""

from __future__ import annotations

import inspect
import sqlite3
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest
from chargebook.acquire.engine import inputs
from chargebook.acquire.engine.engine import HANDLERS, Engine
from chargebook.acquire.protocol import EngineState
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import Store
from chargebook.acquire.session.plan import Plan, SettlingRule, Step
from chargebook.drivers_generic.interface import Capability

from tests.acquire.test_engine import CAPTURE, METADATA, Clock, deliver, small_plan

S = EngineState
OPERATOR = "operator A"


def file_engine(tmp_path: Path, **kwargs) -> tuple[Engine, Clock]:
    clock = Clock()
    caps = kwargs.pop(
        "capabilities", {Capability.ZERO, Capability.INTEGRATE, Capability.READ_CHARGE}
    )
    store = Store.open(tmp_path / "station.sqlite")
    return Engine(store, capabilities=caps, clock=clock, **kwargs), clock


@contextmanager
def commits(engine: Engine) -> Iterator[list[str]]:
    """Collect the COMMIT statements SQLite runs on the engine's connection inside the block."""
    statements: list[str] = []
    conn = engine.store.db.conn
    conn.set_trace_callback(statements.append)
    try:
        yield statements
    finally:
        conn.set_trace_callback(None)
        statements[:] = [s for s in statements if s.strip().upper().startswith("COMMIT")]


def one_commit(engine: Engine, action: Callable[[], object]) -> None:
    with commits(engine) as done:
        action()
    assert len(done) == 1, f"{action} committed {len(done)} times"


def deliver_counting(engine: Engine, clock: Clock, charge_nC: float) -> int:
    """Deliver one reading sample by sample and return the COMMITs its samples caused."""
    with commits(engine) as done:
        deliver(engine, clock, charge_nC)
    return len(done)


def test_every_operator_action_is_one_commit(tmp_path: Path) -> None:
    engine, clock = file_engine(tmp_path)
    one_commit(engine, lambda: engine.start_session(METADATA, small_plan(), actor=OPERATOR))
    one_commit(engine, lambda: engine.set_environment(20.0, 101.325, actor=OPERATOR))
    one_commit(engine, lambda: engine.manual_done(actor=OPERATOR))  # bias switch by hand
    one_commit(engine, lambda: engine.arm(actor=OPERATOR))
    # Every sample that completes a reading is one commit; samples that only move the charge
    # write nothing.
    assert [deliver_counting(engine, clock, c) for c in (20.5, 20.0, 20.0, 20.0)] == [1] * 4
    assert engine.state is S.REVIEWING
    one_commit(engine, lambda: engine.redo("spike on reading 3", actor=OPERATOR))
    one_commit(engine, lambda: engine.arm(actor=OPERATOR))
    engine.on_sample(clock.now + 0.1, 5.0)
    one_commit(engine, lambda: engine.capture(actor=OPERATOR))
    for charge in (20.0, 20.0, 20.0):
        deliver(engine, clock, charge)
    one_commit(engine, lambda: engine.accept(actor=OPERATOR))
    one_commit(engine, lambda: engine.manual_done(actor=OPERATOR))
    one_commit(engine, lambda: engine.arm(actor=OPERATOR))
    engine.on_sample(clock.now + 0.1, -5.0)
    one_commit(engine, lambda: engine.pause(actor=OPERATOR))
    one_commit(engine, lambda: engine.resume(actor=OPERATOR))
    one_commit(engine, lambda: engine.instrument_lost("the serial port went away"))
    one_commit(engine, lambda: engine.instrument_back("SIM-EM-0001"))
    one_commit(engine, lambda: engine.redo("cable checked", actor=OPERATOR))
    one_commit(engine, lambda: engine.stop("only the routine output was needed", actor=OPERATOR))
    one_commit(engine, lambda: engine.close(actor=OPERATOR))
    engine.start_session(METADATA, small_plan(return_check=True), actor=OPERATOR)
    engine.set_environment(20.0, 101.325, actor=OPERATOR)
    one_commit(engine, lambda: engine.abort("chamber cable damaged", True, actor=OPERATOR))
    engine.store.close()


def test_a_skip_and_a_restart_are_one_commit_each(tmp_path: Path) -> None:
    engine, clock = file_engine(tmp_path, capabilities={Capability.SET_BIAS})
    engine.start_session(METADATA, small_plan(return_check=True), actor=OPERATOR)
    engine.set_environment(20.0, 101.325, actor=OPERATOR)
    for charges in ([20.5, 20.0, 20.0, 20.0], [-20.3, -20.0, -20.0, -20.0], [19.9] * 4):
        engine.arm()
        for charge in charges:
            deliver(engine, clock, charge)
        engine.accept()
    one_commit(engine, lambda: engine.skip(actor=OPERATOR))
    assert engine.state is S.FINISHED
    engine.close()
    engine.start_session(METADATA, small_plan(), actor=OPERATOR)
    engine.set_environment(20.0, 101.325, actor=OPERATOR)
    engine.arm()
    deliver(engine, clock, 20.5)
    revived = Engine(engine.store, capabilities=engine.capabilities, clock=clock)
    one_commit(revived, revived.restore)
    assert revived.state is S.INTERRUPTED
    engine.store.close()


def test_a_tick_that_ends_a_settling_wait_is_one_commit_and_other_ticks_none(
    tmp_path: Path,
) -> None:
    waits = SettlingRule(wait_s=5.0)
    plan = Plan("waits", (Step("routine", "routine", 1, 300.0, 2, 100.0, waits),), 300.0, 100.0)
    plan = Plan(plan.name, plan.steps, 300.0, 100.0, capture=CAPTURE)
    engine, clock = file_engine(tmp_path, capabilities={Capability.SET_BIAS})
    engine.start_session(METADATA, plan, actor=OPERATOR)
    engine.set_environment(20.0, 101.325, actor=OPERATOR)
    engine.arm()
    assert engine.state is S.SETTLING and engine.reading is None
    with commits(engine) as idle:
        clock.now += 1.0
        engine.tick()
    assert idle == [] and engine.reading is None
    clock.now += 5.0
    one_commit(engine, engine.tick)
    assert engine.reading is not None and engine.state is S.COLLECTING
    last = engine.store.events(engine.session_id)[-1]
    assert (last.kind, last.detail()["action"]) == (EventKind.STATE_CHANGED, "settling wait over")
    engine.store.close()


def _fail_on_event(engine: Engine, kind: str) -> None:
    """Make SQLite itself refuse the next event of ``kind`` (a real failure mid-transaction)."""
    engine.store.db.execute(
        f"CREATE TEMP TRIGGER refuse_{kind} BEFORE INSERT ON events "
        f"WHEN NEW.kind = '{kind}' BEGIN SELECT RAISE(ABORT, 'disk refused {kind}'); END"
    )


def _heal(engine: Engine, kind: str) -> None:
    engine.store.db.execute(f"DROP TRIGGER refuse_{kind}")


def test_a_redo_that_fails_part_way_leaves_neither_its_rows_nor_its_state(
    tmp_path: Path,
) -> None:
    engine, clock = file_engine(tmp_path)
    session_id = engine.start_session(METADATA, small_plan(), actor=OPERATOR)
    engine.set_environment(20.0, 101.325, actor=OPERATOR)
    engine.manual_done()
    engine.arm()
    for charge in (20.5, 20.0, 23.0, 20.0):
        deliver(engine, clock, charge)
    events_before = len(engine.store.events(session_id))
    # The set's status is written first, then the state_changed event, which SQLite refuses.
    _fail_on_event(engine, EventKind.STATE_CHANGED)
    with pytest.raises(sqlite3.DatabaseError, match="disk refused"):
        engine.redo("spike on reading 3", actor=OPERATOR)
    assert [s.status for s in engine.store.sets(session_id)] == ["reviewing"]
    assert len(engine.store.events(session_id)) == events_before
    assert engine.state is S.REVIEWING and engine.active is not None
    _heal(engine, "state_changed")
    engine.redo("spike on reading 3", actor=OPERATOR)  # the same action goes through after
    assert [s.status for s in engine.store.sets(session_id)] == ["superseded"]
    assert engine.state is S.WAITING_FOR_OPERATOR
    engine.store.close()


def test_a_reading_that_fails_to_record_is_not_half_kept_and_the_next_sample_takes_it(
    tmp_path: Path,
) -> None:
    engine, clock = file_engine(tmp_path)
    session_id = engine.start_session(METADATA, small_plan(settling=SettlingRule()), actor="x")
    engine.set_environment(20.0, 101.325)
    engine.manual_done()
    engine.arm()
    deliver(engine, clock, 20.0)
    deliver(engine, clock, 20.0)
    _fail_on_event(engine, EventKind.SET_STATUS)  # the third reading completes the set
    reading = engine.reading
    with pytest.raises(sqlite3.DatabaseError, match="disk refused"):
        deliver(engine, clock, 20.0)
    assert len(engine.store.readings(session_id)) == 2  # the reading row went with the event
    assert engine.state is S.COLLECTING and engine.reading is reading
    assert len(engine.active.readings) == 2
    _heal(engine, "set_status")
    clock.now += 0.1
    engine.on_sample(clock.now, 20.0)  # still flat: the held reading is taken now
    assert len(engine.store.readings(session_id)) == 3
    assert engine.state is S.REVIEWING
    engine.store.close()


#: Engine methods that are not inputs: they read, or change nothing recorded.
NOT_INPUTS = {
    "all_or_nothing",
    "allowed",
    "apply",
    "instrument_unreachable",  # shown, never recorded
    "record_changed",  # counts a visit's change, written in the daemon's one transaction
    "refusal",
    "results",
    "set_record_fault",  # shown, never recorded: the record cannot commit
    "set_reply_note",  # shown, never recorded: the driver's note on late answers
    "snapshot",
    "take_commands",
    "touch_live",
    "wants_samples",
}


def test_every_public_input_of_the_engine_goes_through_apply_and_every_input_has_a_handler() -> (
    None
):
    public = {
        name
        for name, member in inspect.getmembers(Engine, inspect.isfunction)
        if not name.startswith("_")
    }
    entries = public - NOT_INPUTS
    assert entries >= {"arm", "accept", "redo", "abort", "set_environment", "on_sample", "tick"}
    bypassing = [
        n for n in sorted(entries) if "self.apply(" not in inspect.getsource(getattr(Engine, n))
    ]
    assert bypassing == []
    # one dispatch: every kind of input but the sample and the logged run of samples (taken
    # cheaply, the run with the samples its traffic lines hold) has its handler
    assert set(HANDLERS) | {inputs.Sample, inputs.SampleRun} == set(inputs.KINDS.values())
