"""The record's vocabulary of events (acquire/record/events.py): kinds and detail shapes.

Every kind is stored as the same string a station file already holds, and every event written
has exactly the keys its kind declares: the store refuses any other shape by name, and the
sessions the suite records (through the Store API, through the engine, and through the real
daemon of the demo) hold only events that check.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.record.events import (
    EventKind,
    InstrumentIdentified,
    check_detail,
    detail_keys,
    detail_types,
)
from chargebook.acquire.record.store import EventRow, Store
from chargebook.corrections.errors import InputError
from chargebook.drivers_generic.interface import Capability
from recorded_session import INSTRUMENT, record_example_session, record_long_session
from test_engine import Clock, deliver, small_plan, started, take_set

#: The kinds as station files have stored them since before the enum: the strings must not
#: change, or old files would read differently (common practice for a stored vocabulary).
STORED_KINDS = (
    "session_created",
    "session_status",
    "set_status",
    "station_named",
    "thresholds",
    "acquisition",
    "carried_factors",
    "leakage_subtraction_chosen",
    "state_changed",
    "step_entered",
    "step_skipped",
    "environment_entered",
    "manual_step_done",
    "bias_changed",
    "reading_recorded",
    "reading_dropped",
    "session_resumed",
    "state_restored",
    "instrument_identified",
    "instrument_lost",
    "instrument_fault",
    "instrument_back",
    "daemon_started",
    "daemon_restarted",
    "daemon_stopped",
    "daemon_error",
    "unrecorded_lines_recovered",
    "session_reviewed",
    "replay",
    "replay_not_reproduced",
    "note",
    "register_row",
    "mu_per_reading_set",
    "delivery_short",
    "visit_created",
    "visit_status",
    "visit_beam_added",
    "visit_beam_started",
    "visit_beam_status",
    "visit_beam",
    "visit_reviewed",
    "bench_refused",
)


def _detail_of(kind: EventKind) -> dict[str, object]:
    """Return a detail with every key ``kind`` declares (required and optional), each a text."""
    required, optional = detail_keys(kind)
    return {key: f"{key} value" for key in sorted(required | optional)}


def _checked(events: list[EventRow]) -> set[str]:
    """Check every event's detail against its kind; return the kinds seen."""
    for event in events:
        check_detail(event.kind, event.detail())
    return {event.kind for event in events}


def test_every_stored_kind_round_trips_through_a_station_file(tmp_path: Path) -> None:
    assert [kind.value for kind in EventKind] == list(STORED_KINDS)
    assert set(detail_types()) == set(EventKind)
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        session_id = store.create_session({}, {"steps": []}, "trs398", "6 MV")
        for kind in EventKind:
            store.add_event(session_id, "operator A", kind, _detail_of(kind))
    with Store.open(path, read_only=True) as store:
        stored = [e for e in store.events(session_id) if e.actor == "operator A"]
        written = {row[0] for row in store.read("SELECT DISTINCT kind FROM events")}
    assert [EventKind(e.kind) for e in stored] == list(EventKind)
    assert [e.detail() for e in stored] == [_detail_of(kind) for kind in EventKind]
    assert written == set(STORED_KINDS)


def test_a_detail_missing_a_key_is_refused_naming_the_kind_and_the_key() -> None:
    with pytest.raises(InputError) as refused:
        check_detail(EventKind.INSTRUMENT_IDENTIFIED, {"identity": "Bench, SIM-EM-0001"})
    assert refused.value.field == "instrument_identified detail.profile"
    assert "is missing" in str(refused.value) and "keys identity, profile" in str(refused.value)


def test_a_detail_with_a_key_its_kind_does_not_declare_is_refused_by_name() -> None:
    # The shape a test fixture once wrote for the instrument, which the daemon never writes.
    fixture_shape = {"manufacturer": "Bench", "identity": "Bench", "profile": "scpi-generic"}
    with pytest.raises(InputError) as refused:
        check_detail(EventKind.INSTRUMENT_IDENTIFIED, fixture_shape)
    assert refused.value.field == "instrument_identified detail.manufacturer"
    assert "is not a key of a instrument_identified event" in str(refused.value)


def test_a_kind_that_is_not_in_the_vocabulary_is_refused() -> None:
    with pytest.raises(InputError, match="event kind = 'set_finished' is not a kind of event"):
        check_detail("set_finished", {})
    with pytest.raises(InputError, match=r"note detail = .* is not a dict"):
        check_detail(EventKind.NOTE, ["text"])  # type: ignore[arg-type]


def test_the_store_writes_nothing_of_a_refused_event(tmp_path: Path) -> None:
    with Store.open(tmp_path / "station.sqlite") as store:
        session_id = store.create_session({}, {"steps": []}, "trs398", "6 MV")
        before = store.events(session_id)
        bad = {"volts": 300.0}  # "how" missing
        with pytest.raises(InputError, match=r"bias_changed detail\.how is missing"):
            store.add_event(session_id, "operator A", EventKind.BIAS_CHANGED, bad)
        assert store.events(session_id) == before


def test_the_recorded_example_sessions_hold_only_events_of_their_declared_shape() -> None:
    store = Store.memory()
    example = record_example_session(store)
    long = record_long_session(store)
    kinds = _checked(store.events(example)) | _checked(store.events(long))
    assert EventKind.INSTRUMENT_IDENTIFIED in kinds and EventKind.READING_RECORDED in kinds
    identified = [e for e in store.events(example) if e.kind == EventKind.INSTRUMENT_IDENTIFIED]
    assert [e.detail() for e in identified] == [INSTRUMENT]


def test_a_session_the_engine_records_holds_only_events_of_their_declared_shape() -> None:
    clock = Clock()
    caps = {Capability.ZERO, Capability.INTEGRATE, Capability.READ_CHARGE}
    engine = Engine(Store.memory(), capabilities=caps, clock=clock, profile="query-plain")
    engine.instrument_back("Bench, SIM-MODEL-1, SIM-EM-0001, 1.4")
    session_id = started(engine, small_plan(return_check=True))
    take_set(engine, clock, [20.5, 20.0])
    engine.pause(actor="operator A")
    engine.resume(actor="operator A")
    engine.instrument_lost("the serial port went away")
    engine.instrument_back("Bench, SIM-MODEL-1, SIM-EM-0001, 1.4")
    engine.arm()
    deliver(engine, clock, 20.0)
    engine.redo("the phantom moved", actor="operator A")
    take_set(engine, clock, [20.5, 20.0, 20.0, 20.0])
    engine.accept(actor="operator A")
    take_set(engine, clock, [-20.3, -20.0])
    revived = Engine(engine.store, capabilities=caps, clock=clock)  # the daemon restarted
    revived.restore()
    revived.arm()
    deliver(revived, clock, -20.0)
    deliver(revived, clock, -19.99)
    revived.accept(actor="operator A")
    take_set(revived, clock, [20.1, 20.0, 20.0, 20.0])
    revived.accept(actor="operator A")
    revived.skip(actor="operator A")
    kinds = _checked(engine.store.events(session_id))
    assert kinds >= {
        EventKind.THRESHOLDS,
        EventKind.ACQUISITION,
        EventKind.INSTRUMENT_IDENTIFIED,
        EventKind.ENVIRONMENT_ENTERED,
        EventKind.STATE_CHANGED,
        EventKind.STEP_ENTERED,
        EventKind.MANUAL_STEP_DONE,
        EventKind.BIAS_CHANGED,
        EventKind.READING_RECORDED,
        EventKind.READING_DROPPED,
        EventKind.INSTRUMENT_LOST,
        EventKind.INSTRUMENT_BACK,
        EventKind.SET_STATUS,
        EventKind.SESSION_RESUMED,
        EventKind.STATE_RESTORED,
        EventKind.STEP_SKIPPED,
        EventKind.SESSION_STATUS,
    }


@pytest.mark.e2e
@pytest.mark.slow
def test_a_session_the_real_daemon_records_holds_only_events_of_their_declared_shape(
    tmp_path: Path,
) -> None:
    db = tmp_path / "demo.sqlite"
    plan = Path(__file__).parents[1] / "e2e" / "plans" / "quick.toml"
    command = [sys.executable, "-m", "chargebook", "demo", "--unattended", "--plan", str(plan)]
    command += ["--time-scale", "0.02", "--db", str(db)]
    subprocess.run(command, check=True, capture_output=True, timeout=120)
    with Store.open(db, read_only=True) as store:
        (session,) = store.sessions()
        kinds = _checked(store.events(session.id)) | _checked(store.events(None))
    assert {EventKind.DAEMON_STARTED, EventKind.DAEMON_STOPPED} <= kinds
    assert EventKind.READING_RECORDED in kinds


def test_an_identification_is_stored_as_the_engine_writes_it() -> None:
    store = Store.memory()
    engine = Engine(store, profile="scpi-generic")
    engine.instrument_back("Bench, SIM-MODEL-1, SIM-EM-0001, 1.4")
    (event,) = store.events(None)
    assert event.detail() == InstrumentIdentified(
        identity="Bench, SIM-MODEL-1, SIM-EM-0001, 1.4", profile="scpi-generic"
    )
    assert event.detail() == INSTRUMENT  # the recorded example's fixture has the same shape
