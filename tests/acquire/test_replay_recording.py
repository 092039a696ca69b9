"""Reading what a replay needs from a stored session: its logged inputs placed in its traffic.

Sessions here are written through the Store API, inputs logged as the engine logs them, so that
where each input falls among the traffic lines is known exactly.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest
from chargebook.acquire.engine import inputs
from chargebook.acquire.record import events as ev
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import Store
from chargebook.acquire.replay.recording import (
    NotReplayable,
    before_the_input_log,
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


def logged(store: Store, session_id: int, kind: str, actor: str = "operator A", **detail):
    """Log one input of the session, as the engine does (clock_s, the engine's clock)."""
    store.add_inputs(session_id, [(kind, actor, {"clock_s": 1.0, **detail})])


def started(store: Store) -> int:
    """Return a new session whose input log begins with its start, as a daemon's does."""
    session_id = new_session(store)
    logged(store, session_id, "session_start", metadata=example_metadata(), plan=None)
    return session_id


def exchange(store: Store, session_id: int | None, t_s: float, command: bytes, answer: bytes):
    store.add_traffic(session_id, t_s, "tx", command)
    store.add_traffic(session_id, t_s + 0.001, "rx", answer)


def test_each_input_is_placed_after_the_lines_written_before_it_a_sample_after_its_line(
    store: Store,
):
    session_id = started(store)
    environment = {"temperature_C": 21.0, "pressure": 101.0, "source": "bench"}
    logged(store, session_id, "environment", **environment)
    logged(store, session_id, "arm")
    exchange(store, session_id, 10.0, b"BIAS +300\r\n", b"OK\r\n")
    exchange(store, session_id, 10.1, b"Q?\r\n", b"Q +0.0001 nC A\r\n")
    exchange(store, session_id, 10.2, b"Q?\r\n", b"Q +0.0002 nC A\r\n")
    first_sample = store.traffic(session_id)[3].id  # the answer to the first poll
    # the sample is logged later, with the next input that writes (the redo)
    sample = {"t_s": 10.101, "charge_nC": 0.0001, "line_id": first_sample}
    logged(store, session_id, "sample", actor="daemon", **sample)
    logged(store, session_id, "redo", reason="the phantom moved")
    store.set_session_status(session_id, "aborted", "stopped for the day")
    recording = load_recording(store, session_id)
    placed = [(i.position, i.given.kind, i.given.actor, i.line) for i in recording.inputs]
    assert placed == [
        (0, "environment", "operator A", None),
        (0, "arm", "operator A", None),
        (4, "sample", "daemon", 3),  # right after the line it was parsed from
        (6, "redo", "operator A", None),  # after every line written before it
    ]
    assert recording.inputs[-1].given == inputs.Redo(
        reason="the phantom moved", actor="operator A", clock_s=1.0
    )
    assert recording.start.metadata == example_metadata()
    assert [line.direction for line in recording.lines] == ["tx", "rx"] * 3


def test_a_session_recorded_before_the_input_log_is_refused_saying_why(store: Store):
    old = new_session(store)  # no input log at all
    store.set_session_status(old, "finished")
    with pytest.raises(NotReplayable) as refused:
        load_recording(store, old)
    assert str(refused.value) == before_the_input_log(old)
    assert f"session {old} was recorded before the input log" in str(refused.value)
    assert "cannot be replayed exactly" in str(refused.value)
    # begun before the upgrade, resumed after it: its log begins with the restart
    resumed = new_session(store)
    logged(store, resumed, "restart", actor="daemon")
    store.set_session_status(resumed, "finished")
    with pytest.raises(NotReplayable, match=f"session {resumed} was recorded before the input"):
        load_recording(store, resumed)


def sampled_once(store: Store, of_line: int, **sample) -> tuple[int, int]:
    """Return (session id, line id) of a finished session of one poll, whose line ``of_line``
    (0 the query, 1 the answer) a logged sample names, with ``sample``'s values."""
    session_id = started(store)
    exchange(store, session_id, 1.0, b"Q?\r\n", b"Q +1.0000 nC A\r\n")
    line_id = store.traffic(session_id)[of_line].id
    logged(store, session_id, "sample", actor="daemon", **{"line_id": line_id, **sample})
    store.set_session_status(session_id, "finished")
    return session_id, line_id


def test_a_sample_naming_no_line_the_session_received_is_refused(store: Store):
    session_id, sent = sampled_once(store, 0, t_s=1.0, charge_nC=1.0)
    with pytest.raises(NotReplayable, match=f"traffic line id {sent}, which is not a line"):
        load_recording(store, session_id)


def test_a_session_that_starts_mid_exchange_gets_the_command_from_before_it(store: Store):
    store.add_traffic(None, 0.5, "tx", b"*IDN?\n")  # sent before the session existed
    session_id = started(store)
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


def test_the_profile_and_time_scale_come_from_the_acquisition_event(store: Store):
    session_id = started(store)
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
    session_id = started(store)
    set_id = store.add_set(session_id, 1, "routine", "routine", 1, 300.0, 1)
    armed = {"from": "waiting_for_operator", "to": "collecting", "action": "step.arm"}
    store.add_event(session_id, "operator A", EventKind.STATE_CHANGED, {**armed, "set_id": set_id})
    exchange(store, session_id, 1.0, b"Q?\r\n", b"Q +19.6000 nC A\r\n")
    recorded = ev.ReadingRecorded(
        reading_id=1,
        set_id=set_id,
        charge_nC=19.6,
        capture="auto",
        settling=False,
        integration_s=0.5,
        armed_t_s=0.501,
    )
    store.add_event(session_id, "daemon", EventKind.READING_RECORDED, recorded)
    exchange(store, session_id, 2.0, b"Q?\r\n", b"Q +19.6000 nC A\r\n")
    store.set_set_status(set_id, "reviewing")
    store.set_set_status(set_id, "accepted")
    store.set_session_status(session_id, "finished")
    words = traffic_positions(store, load_recording(store, session_id))
    assert words[0] == "in reading set 'routine' (attempt 1) after 0 readings"
    assert words[2] == "in reading set 'routine' (attempt 1) after 1 reading"
    assert words[4] == "after reading set 'routine' (attempt 1) ended accepted"


@pytest.mark.parametrize(
    ("edited", "said"),
    [
        ({"t_s": "ten"}, "t_s is 'ten', not a number"),
        ({"charge_nC": True}, "charge_nC is True, not a number"),
        ({"status": 0}, "status is 0, not text"),
        ({"line_id": 0}, "line_id is 0, not a whole number of at least 1"),
        ({"volts": 300.0}, "unexpected keyword argument 'volts'"),
    ],
)
def test_a_logged_sample_edited_by_hand_is_refused_naming_the_input_and_the_field(
    store: Store, edited: dict, said: str
):
    session_id, _ = sampled_once(store, 1, **{"t_s": 1.001, "charge_nC": 1.0, **edited})
    input_id = store.inputs(session_id)[-1].id
    with pytest.raises(NotReplayable) as refused:
        load_recording(store, session_id)
    assert f"input {input_id} of session {session_id} (sample) cannot be read" in str(refused.value)
    assert said in str(refused.value)


def test_a_logged_sample_with_whole_numbers_is_read_as_logged(store: Store):
    session_id, answer = sampled_once(store, 1, t_s=2, charge_nC=1)
    (sample,) = load_recording(store, session_id).inputs
    assert sample.given == inputs.Sample(
        actor="daemon", clock_s=1.0, t_s=2, charge_nC=1, line_id=answer
    )
    assert (sample.position, sample.line) == (2, 1)


@pytest.mark.parametrize(
    ("detail_json", "said"),
    [('{"t_s": 1.0, "charge_nC"', "Expecting ':' delimiter"), ('{"t_s": 1.0} {}', "Extra data")],
)
def test_a_logged_detail_that_is_not_one_json_object_is_refused_as_json_says(
    store: Store, detail_json: str, said: str
):
    session_id = started(store)
    with store.atomic():  # written by hand past the store's API, chain values and all
        store.conn.execute(
            "INSERT INTO inputs (session_id, recorded_at, kind, actor, detail_json, chain_seq, "
            "chain_hash) VALUES (?, 'then', 'sample', 'daemon', ?, 99, 'edited')",
            (session_id, detail_json),
        )
    store.set_session_status(session_id, "finished")
    with pytest.raises(NotReplayable, match=f"session {session_id} \\(sample\\) cannot be read"):
        load_recording(store, session_id)
    with pytest.raises(NotReplayable, match=said):
        load_recording(store, session_id)
