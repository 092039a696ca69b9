"""The recorded traffic in a replay: the playback log, a user's log, and the follower.

The playback log is read back with the simulator's own reader
(``drivers_generic.simulator.playback.read_log``), the other end of the format.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import Store
from chargebook.acquire.replay.pipeline import same_command
from chargebook.acquire.replay.recording import RecordedLine, Recording, load_recording
from chargebook.acquire.replay.traffic import (
    Divergence,
    TrafficFollower,
    TrafficLogError,
    line_bytes,
    line_text,
    read_traffic_log,
    write_playback_log,
)
from chargebook.drivers_generic import load_profile
from chargebook.drivers_generic.interface import TrafficDirection
from chargebook.drivers_generic.simulator.playback import read_log
from recorded_session import example_metadata, example_plan

QUERY_PLAIN = load_profile("query-plain")
LINES = (
    RecordedLine(0, 10.25, "tx", b"BIAS +300\r\n"),
    RecordedLine(1, 10.2625, "rx", b"OK\r\n"),
    RecordedLine(2, 10.5, "tx", b"Q?\r\n"),
    RecordedLine(3, 10.503906, "rx", b"Q +19.6023 nC A\r\n"),
)


@pytest.fixture
def recording() -> Recording:
    store = Store.memory()
    session_id = store.create_session(
        example_metadata(), example_plan().to_dict(), "trs398", "6 MV"
    )
    start = {"metadata": example_metadata(), "plan": None, "clock_s": 0.0}
    store.add_inputs(session_id, [("session_start", "operator A", start)])
    for line in LINES:
        store.add_traffic(session_id, line.t_s, line.direction, line.raw)
    store.set_session_status(session_id, "finished")
    return load_recording(store, session_id)


def test_a_line_keeps_bytes_that_are_not_text_through_its_text_form():
    raw = b"Q +1\xff.0000 nC A\r\n"
    text = line_text(QUERY_PLAIN, RecordedLine(0, 1.0, "rx", raw))
    assert text == "Q +1\udcff.0000 nC A"  # Python's surrogateescape for byte 0xff
    assert line_bytes(QUERY_PLAIN, "rx", text) == raw


def test_the_playback_log_reads_back_with_the_simulators_reader(tmp_path: Path):
    path = write_playback_log(QUERY_PLAIN, LINES, tmp_path / "playback.jsonl")
    assert read_log(path) == [
        (10.25, "tx", "BIAS +300"),
        (10.2625, "rx", "OK"),
        (10.5, "tx", "Q?"),
        (10.503906, "rx", "Q +19.6023 nC A"),
    ]


def positions(recording: Recording) -> list[str]:
    return [f"at {i}" for i in range(len(recording.lines) + 1)]


def test_a_log_of_the_session_reads_as_its_lines(tmp_path: Path, recording: Recording):
    path = write_playback_log(QUERY_PLAIN, recording.lines, tmp_path / "log.jsonl")
    assert read_traffic_log(path, recording, QUERY_PLAIN, positions(recording)) == recording.lines


def truncated(lines: list[str]) -> list[str]:
    return lines[:3]


def one_too_many(lines: list[str]) -> list[str]:
    return [*lines, lines[-1]]


def wrong_direction(lines: list[str]) -> list[str]:
    return [lines[0], lines[1].replace('"rx"', '"tx"'), *lines[2:]]


def cut_short(lines: list[str]) -> list[str]:
    return [lines[0], lines[1][:-3], *lines[2:]]


def middle_line_deleted(lines: list[str]) -> list[str]:
    return [lines[0], *lines[2:]]


def middle_line_twice(lines: list[str]) -> list[str]:
    return [lines[0], lines[1], lines[1], *lines[2:]]


def time_as_text(lines: list[str]) -> list[str]:
    return [lines[0], lines[1].replace("10.2625", '"late"'), *lines[2:]]


@pytest.mark.parametrize(
    ("edit", "message"),
    [
        (
            truncated,
            "is truncated: it ends after line 3, the session recorded 4 lines; it stops at 3",
        ),
        (one_too_many, "has 5 lines, session 1 recorded 4: log line 5 repeats line 4"),
        (
            middle_line_deleted,
            "has 3 lines, session 1 recorded 4: line 2 of the session (rx 'OK', at 1) is "
            "missing from the log, deleted between log lines 1 and 2",
        ),
        (
            middle_line_twice,
            "has 5 lines, session 1 recorded 4: log line 3 repeats line 2 ('OK')",
        ),
        (
            wrong_direction,
            "line 2: dir = 'tx' is not allowed; session 1 recorded 'rx' there (at 1)",
        ),
        (cut_short, "line 2: not valid JSON"),
        (time_as_text, "line 2: t_s = 'late' is not allowed"),
    ],
)
def test_a_corrupted_or_truncated_log_is_refused_naming_the_session_and_line(
    tmp_path: Path, recording: Recording, edit, message: str
):
    path = write_playback_log(QUERY_PLAIN, recording.lines, tmp_path / "log.jsonl")
    path.write_text("\n".join(edit(path.read_text().splitlines())) + "\n")
    with pytest.raises(TrafficLogError) as refused:
        read_traffic_log(path, recording, QUERY_PLAIN, positions(recording))
    assert "session 1" in str(refused.value) and message in str(refused.value)


def attached_follower() -> tuple[Store, int, TrafficFollower]:
    """Return a store in memory, a session in it, and a follower of LINES writing to it."""
    store = Store.memory()
    session_id = store.create_session(
        example_metadata(), example_plan().to_dict(), "trs398", "6 MV"
    )
    follower = TrafficFollower(LINES, QUERY_PLAIN)
    follower.attach(store, session_id)
    return store, session_id, follower


def test_the_follower_stamps_each_line_with_its_recorded_time_and_writes_it():
    store, session_id, follower = attached_follower()
    for line in LINES:
        t_s = follower.clock()
        follower(TrafficDirection(line.direction), t_s, line.raw)
    follower.flush()
    assert follower.finished and follower.last_t_s == 10.503906
    assert [(r.t_s, r.direction, r.line) for r in store.traffic(session_id)] == [
        (line.t_s, line.direction, line.raw) for line in LINES
    ]


def test_the_follower_writes_its_lines_a_batch_at_a_time_and_names_the_last_received():
    # One statement per batch, not per line: nothing is written until the store is about to
    # write anything else (the lines then come first in the chain) or the lines are flushed;
    # the id of the line a sample came from is known before it is written, and is its id.
    store, session_id, follower = attached_follower()
    for line in LINES[:3]:  # BIAS, OK, Q?: the latest received line is the OK
        follower(TrafficDirection(line.direction), follower.clock(), line.raw)
    received_id = follower.last_received_id
    assert store.traffic(session_id) == []
    detail = {"replay_of": 1, "speed": 0.0, "traffic_log": None, "plan": None, "thresholds": None}
    event_id = store.add_event(session_id, "replay", EventKind.REPLAY, detail)
    rows = store.traffic(session_id)
    assert [r.line for r in rows] == [line.raw for line in LINES[:3]]
    assert received_id == rows[1].id and rows[1].line == b"OK\r\n"
    seq = "SELECT max(chain_seq) FROM {} WHERE session_id = ?"
    lines_seq = store.conn.execute(seq.format("traffic"), (session_id,)).fetchone()[0]
    event_seq = store.conn.execute(
        "SELECT chain_seq FROM events WHERE id = ?", (event_id,)
    ).fetchone()[0]
    assert lines_seq < event_seq  # the lines came first in the chain, as they came first
    follower(TrafficDirection.RECEIVED, follower.clock(), LINES[3].raw)
    received_id = follower.last_received_id
    follower.detach()
    assert received_id == store.traffic(session_id)[3].id
    assert store.before_write is None
    follower.flush()  # nothing left: writes nothing more
    assert len(store.traffic(session_id)) == len(LINES)


def test_the_follower_refuses_to_go_on_when_something_else_wrote_raw_lines():
    # Row ids are counted, not asked: a raw line written by anyone else would shift them, and
    # a sample would name the wrong line; the replay stops instead.
    store, session_id, follower = attached_follower()
    follower(TrafficDirection(LINES[0].direction), follower.clock(), LINES[0].raw)
    follower.store = None  # write one line as another writer would, around the follower
    store.add_traffic_many([(session_id, 0.0, store.stamp(), "rx", b"X\r\n")])
    follower.store = store
    with pytest.raises(RuntimeError, match="something else wrote raw lines"):
        follower.flush()


def test_the_follower_stops_a_replay_at_the_first_line_that_differs():
    follower = TrafficFollower(LINES, QUERY_PLAIN)
    follower(TrafficDirection.SENT, follower.clock(), b"BIAS +300\r\n")
    follower(TrafficDirection.RECEIVED, follower.clock(), b"OK\r\n")
    with pytest.raises(Divergence) as diverged:
        follower(TrafficDirection.SENT, follower.clock(), b"HOLD\r\n")
    assert str(diverged.value) == (
        "at traffic line 3 the replay sent 'HOLD' where the original sent 'Q?'"
    )


def test_a_what_if_follower_notes_the_same_command_sent_with_other_values():
    follower = TrafficFollower(LINES, QUERY_PLAIN, same_command=same_command(QUERY_PLAIN))
    follower(TrafficDirection.SENT, follower.clock(), b"BIAS +150\r\n")
    assert [(n.index, n.recorded, n.sent) for n in follower.notes] == [
        (0, "BIAS +300", "BIAS +150")
    ]
    follower(TrafficDirection.RECEIVED, follower.clock(), b"OK\r\n")
    with pytest.raises(Divergence, match="line 3"):  # another command than the recorded one
        follower(TrafficDirection.SENT, follower.clock(), b"QZ\r\n")


def test_a_line_after_the_last_recorded_one_stops_the_replay():
    follower = TrafficFollower(LINES[:1], QUERY_PLAIN)
    follower(TrafficDirection.SENT, follower.clock(), b"BIAS +300\r\n")
    with pytest.raises(Divergence, match=r"after the last recorded line \(1\).*received 'OK'"):
        follower(TrafficDirection.RECEIVED, follower.clock(), b"OK\r\n")


def test_the_log_keeps_recorded_times_exactly(tmp_path: Path):
    awkward = (RecordedLine(0, 1234.5678901234567, "tx", b"Q?\r\n"),)
    path = write_playback_log(QUERY_PLAIN, awkward, tmp_path / "times.jsonl")
    assert json.loads(path.read_text())["t_s"] == 1234.5678901234567


POLLS = (
    *LINES[:2],
    RecordedLine(2, 10.5, "tx", b"Q?\r\n"),
    RecordedLine(3, 10.51, "rx", b"Q +19.6023 nC A\r\n"),
    RecordedLine(4, 10.55, "tx", b"Q?\r\n"),
    RecordedLine(5, 10.56, "rx", b"Q +19.7001 nC A\r\n"),
    RecordedLine(6, 10.6, "tx", b"Q?\r\n"),
    RecordedLine(7, 10.61, "rx", b"Q +19.8002 nC A\r\n"),
)


def test_polls_in_flight_are_written_as_recorded_each_query_then_its_answer():
    # Three queries sent in one write and their answers read in two bursts: each pair is
    # checked against the recording and written as the recording has it, with its recorded
    # times, and the follower names the row of each answer.
    store = Store.memory()
    session_id = store.create_session(
        example_metadata(), example_plan().to_dict(), "trs398", "6 MV"
    )
    follower = TrafficFollower(POLLS, QUERY_PLAIN)
    follower.attach(store, session_id)
    for line in POLLS[:2]:
        follower(TrafficDirection(line.direction), follower.clock(), line.raw)
    follower.burst(TrafficDirection.SENT, follower.clock(), [b"Q?\r\n"] * 3)
    follower.burst(TrafficDirection.RECEIVED, follower.clock(), [POLLS[3].raw])
    follower.burst(TrafficDirection.RECEIVED, follower.clock(), [POLLS[5].raw, POLLS[7].raw])
    follower.detach()
    rows = store.traffic(session_id)
    assert [(r.t_s, r.direction, r.line) for r in rows] == [
        (line.t_s, line.direction, line.raw) for line in POLLS
    ]
    assert follower.answered == [(3, rows[3].id), (5, rows[5].id), (7, rows[7].id)]
    assert follower.finished and follower.last_t_s == 10.61


def test_an_answer_in_flight_that_differs_from_the_recording_stops_the_replay_naming_it():
    follower = TrafficFollower(POLLS, QUERY_PLAIN)
    for line in POLLS[:2]:
        follower(TrafficDirection(line.direction), follower.clock(), line.raw)
    follower.burst(TrafficDirection.SENT, follower.clock(), [b"Q?\r\n"] * 3)
    with pytest.raises(Divergence) as diverged:
        follower.burst(TrafficDirection.RECEIVED, 0.0, [POLLS[3].raw, b"Q +19.7002 nC A\r\n"])
    assert str(diverged.value) == (
        "at traffic line 6 the replay received 'Q +19.7002 nC A' where the original received "
        "'Q +19.7001 nC A'"
    )
    queries = TrafficFollower(POLLS, QUERY_PLAIN)  # more queries than the recording has
    with pytest.raises(Divergence, match="at traffic line 1 the replay sent 'Q\\?'"):
        queries.burst(TrafficDirection.SENT, 0.0, [b"Q?\r\n"] * 2)
