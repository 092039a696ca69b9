"""Reading what a replay needs from a stored session: inputs placed in the traffic, arming times.

Sessions here are written through the Store API with a hand clock for ``recorded_at``, so that
where each event falls among the traffic lines is known exactly.
"""

from __future__ import annotations

import json
from datetime import UTC, datetime, timedelta

import pytest
from chargebook.acquire.record import events as ev
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import Store
from chargebook.acquire.replay.recording import (
    NotReplayable,
    load_recording,
    traffic_positions,
)
from recorded_session import example_metadata, example_plan


class Stamps:
    """A store clock that moves one millisecond per write."""

    def __init__(self) -> None:
        self.now = datetime(2025, 3, 4, 9, 0, tzinfo=UTC)

    def __call__(self) -> datetime:
        self.now += timedelta(milliseconds=1)
        return self.now


@pytest.fixture
def store() -> Store:
    return Store.memory(now=Stamps())


def new_session(store: Store) -> int:
    metadata = example_metadata()
    plan = example_plan().to_dict()
    return store.create_session(metadata, plan, "trs398", "6 MV", actor="operator A")


def state_changed(store: Store, session_id: int, action: str, actor: str = "operator A", **more):
    detail = {"from": "waiting_for_operator", "to": "collecting", "action": action, **more}
    store.add_event(session_id, actor, EventKind.STATE_CHANGED, detail)


def reading_recorded(
    store: Store,
    session_id: int,
    reading_id: int,
    set_id: int,
    *,
    capture: str = "auto",
    actor: str = "daemon",
    t_s: float = 10.0,
    integration_s: float = 0.5,
) -> None:
    """Record a reading's event in the shape the engine writes it."""
    detail = ev.ReadingRecorded(
        reading_id=reading_id,
        set_id=set_id,
        charge_nC=7.5,
        capture=capture,
        settling=False,
        integration_s=integration_s,
        armed_t_s=t_s - integration_s,
    )
    store.add_event(session_id, actor, EventKind.READING_RECORDED, detail)


def exchange(store: Store, session_id: int | None, t_s: float, command: bytes, answer: bytes):
    store.add_traffic(session_id, t_s, "tx", command)
    store.add_traffic(session_id, t_s + 0.001, "rx", answer)


def test_each_operator_action_is_placed_after_the_lines_written_before_it(store: Store):
    session_id = new_session(store)
    state_changed(store, session_id, "session.start")  # the start is not a replayed input
    entry = ev.EnvironmentEntered(
        temperature_C=21.0,
        pressure_kPa=101.0,
        pressure_entered=101.0,
        pressure_unit="kPa",
        humidity_pct=None,
        environment_id=1,
        source="operator",
    )
    store.add_event(session_id, "operator A", EventKind.ENVIRONMENT_ENTERED, entry)
    state_changed(store, session_id, "step.arm")
    exchange(store, session_id, 10.0, b"BIAS +300\r\n", b"OK\r\n")
    exchange(store, session_id, 10.1, b"Q?\r\n", b"Q +0.0001 nC A\r\n")
    reading_recorded(store, session_id, 1, 1)
    reading_recorded(store, session_id, 2, 1, capture="manual", actor="operator A")
    exchange(store, session_id, 10.2, b"HOLD\r\n", b"OK\r\n")
    state_changed(store, session_id, "set.redo", reason="the phantom moved")
    store.set_session_status(session_id, "aborted", "stopped for the day")
    recording = load_recording(store, session_id)
    placed = [(i.position, i.kind, i.actor) for i in recording.inputs]
    assert placed == [
        (0, "environment", "operator A"),
        (0, "arm", "operator A"),
        (4, "capture", "operator A"),  # a manual capture; the automatic one is an outcome
        (6, "redo", "operator A"),
    ]
    assert recording.inputs[-1].detail["reason"] == "the phantom moved"
    assert [line.direction for line in recording.lines] == ["tx", "rx"] * 3


def test_the_instrument_coming_back_is_an_input_only_after_it_was_lost(store: Store):
    session_id = new_session(store)
    identity = ev.InstrumentBack(identity="chargebook-sim, QUERY-PLAIN, SIM-EM-0001, 0.1.0")
    store.add_event(session_id, "daemon", EventKind.INSTRUMENT_BACK, identity)  # first connection
    exchange(store, session_id, 1.0, b"Q?\r\n", b"Q +1.0000 nC A\r\n")
    lost = ev.InstrumentMessage(message="cable pulled")
    store.add_event(session_id, "daemon", EventKind.INSTRUMENT_LOST, lost)
    exchange(
        store, session_id, 5.0, b"ID?\r\n", b"chargebook-sim;QUERY-PLAIN;SIM-EM-0001;0.1.0\r\n"
    )
    store.add_event(session_id, "daemon", EventKind.INSTRUMENT_BACK, identity)
    store.set_session_status(session_id, "finished")
    kinds = [(i.position, i.kind) for i in load_recording(store, session_id).inputs]
    assert kinds == [(2, "instrument_lost"), (4, "instrument_back")]


def test_a_session_that_starts_mid_exchange_gets_the_command_from_before_it(store: Store):
    store.add_traffic(None, 0.5, "tx", b"*IDN?\n")  # sent before the session existed
    session_id = new_session(store)
    store.add_traffic(session_id, 0.6, "rx", b"chargebook-sim,SIM-SCPI,SIM-EM-0001,0.1.0\n")
    exchange(store, session_id, 1.0, b"FETC?\n", b"+2.0E-08\n")
    store.set_session_status(session_id, "finished")
    lines = load_recording(store, session_id).lines
    assert [(line.direction, line.raw[:5]) for line in lines] == [
        ("tx", b"*IDN?"),
        ("rx", b"charg"),
        ("tx", b"FETC?"),
        ("rx", b"+2.0E"),
    ]


def test_arming_times_are_read_from_the_readings_events(store: Store):
    session_id = new_session(store)
    set_id = store.add_set(session_id, 1, "routine", "routine", 1, 300.0, 1)
    first = store.add_reading(session_id, set_id, 1, 20.5, 19.6, "auto", False, "ok")
    second = store.add_reading(session_id, set_id, 2, 31.0, 19.6, "auto", False, "ok")
    reading_recorded(store, session_id, first, set_id, t_s=20.5, integration_s=0.5)
    # An event as an older daemon wrote it, without the arming time: copied in as stored.
    older = {"reading_id": second, "integration_s": 0.75}
    store.append_row(
        "events",
        {
            "session_id": session_id,
            "recorded_at": store.stamp(),
            "actor": "daemon",
            "kind": EventKind.READING_RECORDED.value,
            "detail_json": json.dumps(older),
        },
    )
    store.set_session_status(session_id, "finished")
    recording = load_recording(store, session_id)
    # An older session: the second arming time is rebuilt as capture time - integration time.
    assert recording.armed_times_s == (20.0, 30.25)
    assert recording.armed_times_recorded is False


def test_the_profile_and_time_scale_come_from_the_acquisition_event(store: Store):
    session_id = new_session(store)
    detail = ev.Acquisition(profile="push-exponent", time_scale=0.02)
    store.add_event(session_id, "daemon", EventKind.ACQUISITION, detail)
    store.set_session_status(session_id, "finished")
    recording = load_recording(store, session_id)
    assert (recording.profile, recording.time_scale) == ("push-exponent", 0.02)


def test_an_open_session_is_not_replayable(store: Store):
    session_id = new_session(store)
    with pytest.raises(NotReplayable, match=f"session {session_id} is still open"):
        load_recording(store, session_id)


def test_where_the_session_stood_at_each_line_is_said_in_words(store: Store):
    session_id = new_session(store)
    set_id = store.add_set(session_id, 1, "routine", "routine", 1, 300.0, 1)
    state_changed(store, session_id, "step.arm", set_id=set_id)
    exchange(store, session_id, 1.0, b"Q?\r\n", b"Q +19.6000 nC A\r\n")
    reading_recorded(store, session_id, 1, set_id)
    exchange(store, session_id, 2.0, b"Q?\r\n", b"Q +19.6000 nC A\r\n")
    store.set_set_status(set_id, "reviewing")
    store.set_set_status(set_id, "accepted")
    store.set_session_status(session_id, "finished")
    words = traffic_positions(store, load_recording(store, session_id))
    assert words[0] == "in reading set 'routine' (attempt 1) after 0 readings"
    assert words[2] == "in reading set 'routine' (attempt 1) after 1 reading"
    assert words[4] == "after reading set 'routine' (attempt 1) ended accepted"


def test_a_capture_by_hand_is_placed_right_after_the_sample_it_took(store: Store):
    session_id = new_session(store)
    set_id = store.add_set(session_id, 1, "routine", "routine", 1, 300.0, 1)
    state_changed(store, session_id, "step.arm", set_id=set_id)
    exchange(store, session_id, 10.1, b"Q?\r\n", b"Q +7.5000 nC A\r\n")
    # The next sample was written before the request reached the engine, but came after it.
    exchange(store, session_id, 10.15, b"Q?\r\n", b"Q +9.9000 nC A\r\n")
    received_t_s = 10.1 + 0.001  # the first sample's line, as exchange() writes it
    reading = store.add_reading(session_id, set_id, 1, received_t_s, 7.5, "manual", False, "ok")
    reading_recorded(
        store, session_id, reading, set_id, capture="manual", actor="operator A", t_s=received_t_s
    )
    store.set_session_status(session_id, "aborted", "phantom moved")
    placed = [(i.position, i.kind) for i in load_recording(store, session_id).inputs]
    assert placed == [(0, "arm"), (2, "capture")]
