"""The replay's loop without processes: the real query-plain driver over a scripted transport (the
recorded lines, as the instrument's side), the real engine, an in-memory store.

The recordings are written here line by line, as the daemon would have recorded them, so that
the moments the daemon leaves to chance (a stale poll, a sample that reaches the engine just
after the operator's abort) are there every time. Charges and times are invented round numbers.
"""

from __future__ import annotations

import math

import pytest
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.record.store import Store
from chargebook.acquire.replay.conductor import ArmingClock, Conductor, Pacer
from chargebook.acquire.replay.recording import RecordedInput, RecordedLine
from chargebook.acquire.replay.traffic import Divergence, TrafficFollower, line_bytes
from chargebook.acquire.session.plan import CaptureRule, Plan, Step
from chargebook.drivers_generic import ProfileElectrometer, load_profile
from chargebook.drivers_generic.interface import TrafficDirection
from chargebook.drivers_generic.transport import ScriptedTransport

QUERY_PLAIN = load_profile("query-plain")
PLAN = Plan(
    "one-set",
    (Step("routine", "routine", 1, 300.0, 2, 100.0),),
    300.0,
    capture=CaptureRule(hold_s=0.1),
)
ENVIRONMENT = {
    "temperature_C": 21.5, "pressure_entered": 100.8, "pressure_unit": "kPa", "source": "bench",
}  # fmt: skip


def recorded(*exchanges: tuple[float, str, str | None]) -> tuple[RecordedLine, ...]:
    """Return the lines of (time, command, answer) exchanges; the answer 1 ms after."""
    lines = []
    for t_s, command, answer in exchanges:
        lines.append(RecordedLine(len(lines), t_s, "tx", line_bytes(QUERY_PLAIN, "tx", command)))
        if answer is not None:
            raw = line_bytes(QUERY_PLAIN, "rx", answer)
            lines.append(RecordedLine(len(lines), t_s + 0.001, "rx", raw))
    return tuple(lines)


def arming(*polls: tuple[float, str], start_s: float = 1.0) -> list[tuple[float, str, str | None]]:
    """Return the exchanges of one reading: bias, zero and start, then the polls."""
    exchanges: list[tuple[float, str, str | None]] = [
        (start_s, "BIAS +300", "OK"),
        (start_s + 0.01, "QZ", "OK"),
        (start_s + 0.02, "RUN", "OK"),
    ]
    return exchanges + [(t_s, "Q?", f"Q {charge} nC A") for t_s, charge in polls]


def replay(
    lines: tuple[RecordedLine, ...],
    inputs: list[RecordedInput],
    captured_times_s: frozenset[float] = frozenset(),
    armed_times_s: tuple[float, ...] = (),
) -> tuple[Engine, int]:
    """Play ``lines`` and ``inputs`` through the driver and the engine; return both."""
    follower = TrafficFollower(lines, QUERY_PLAIN)
    script = [
        (follower.text(line), [follower.text(n) for n in _answers(lines, line.index)])
        for line in lines
        if line.direction == "tx"
    ]
    transport = ScriptedTransport(
        QUERY_PLAIN.framing, script, traffic=follower, clock=follower.clock
    )
    driver = ProfileElectrometer(QUERY_PLAIN, transport)
    store = Store.memory()
    clock = ArmingClock(
        armed_times_s or (0.99,),
        played=lambda: follower.played_t_s,
        until=lambda: follower.next_sent_t_s("RUN"),
        otherwise=lambda: follower.last_t_s,
    )
    engine = Engine(
        store, capabilities=QUERY_PLAIN.capabilities, clock=clock, profile="query-plain"
    )
    session_id = engine.start_session(demo_metadata(), PLAN, actor="operator A")
    follower.attach(store, session_id)
    driver.open()
    Conductor(
        engine,
        driver,
        follower,
        inputs,
        strict=True,
        pacer=Pacer(0),
        actor=lambda actor: f"{actor} (replayed)",
        captured_times_s=captured_times_s,
    ).run()
    driver.close()  # the script fails here if a recorded exchange was not played
    return engine, session_id


def _answers(lines: tuple[RecordedLine, ...], index: int) -> list[RecordedLine]:
    answers = []
    for line in lines[index + 1 :]:
        if line.direction == "tx":
            break
        answers.append(line)
    return answers


def operator(position: int, kind: str, **detail) -> RecordedInput:
    return RecordedInput(position, kind, "operator A", detail, event_id=position)


def test_readings_are_taken_from_the_recorded_lines_at_their_recorded_times():
    flat = [(1.05, "+10.0000"), (1.10, "+20.0000"), (1.15, "+20.0000"), (1.25, "+20.0000")]
    second = [(2.05, "+19.0000"), (2.10, "+19.0000"), (2.25, "+19.0000")]
    lines = recorded(
        *arming(*flat),
        (1.30, "HOLD", "OK"), (1.31, "QZ", "OK"), (1.32, "RUN", "OK"),
        *[(t, "Q?", f"Q {q} nC A") for t, q in second],
        (2.30, "HOLD", "OK"),
    )  # fmt: skip
    inputs = [operator(0, "environment", **ENVIRONMENT), operator(0, "arm")]
    engine, session_id = replay(lines, inputs, armed_times_s=(0.99, 1.305))
    readings = engine.store.readings(session_id)
    assert [(r.charge_nC, r.t_s) for r in readings] == [(20.0, 1.251), (19.0, 2.251)]
    events = [e.detail() for e in engine.store.events(session_id) if e.kind == "reading_recorded"]
    assert [e["armed_t_s"] for e in events] == [0.99, 1.305]
    assert engine.state.value == "reviewing"


def test_a_poll_sent_before_the_engines_commands_is_stale_as_it_was_for_the_daemon():
    flat = [(1.05, "+10.0000"), (1.10, "+20.0000"), (1.25, "+20.0000")]
    lines = recorded(
        *arming(*flat),
        (1.27, "Q?", "Q +20.0100 nC A"),  # polled before the daemon sent HOLD: stale
        (1.30, "HOLD", "OK"), (1.31, "QZ", "OK"), (1.32, "RUN", "OK"),
    )  # fmt: skip
    inputs = [operator(0, "environment", **ENVIRONMENT), operator(0, "arm")]
    engine, session_id = replay(lines, inputs)
    assert [r.charge_nC for r in engine.store.readings(session_id)] == [20.0]
    assert engine.state.value == "collecting"  # the second reading is armed, no sample yet


def test_a_sample_that_reached_the_engine_after_the_abort_takes_no_reading():
    # The last poll would end the reading (flat for the 0.1 s hold), but the original took no
    # reading from it: the operator's abort reached the engine first.
    flat = [(1.05, "+10.0000"), (1.10, "+20.0000"), (1.25, "+20.0000")]
    lines = recorded(*arming(*flat), (1.30, "HOLD", "OK"))
    abort_at = len(lines) - 2  # recorded after the last poll, before the HOLD it caused
    inputs = [
        operator(0, "environment", **ENVIRONMENT),
        operator(0, "arm"),
        operator(abort_at, "abort", reason="phantom moved"),
    ]
    engine, session_id = replay(lines, inputs)
    assert engine.store.readings(session_id) == []
    assert engine.store.session(session_id).status == "aborted"


def test_the_same_sample_taken_as_a_reading_in_the_original_is_taken_again():
    flat = [(1.05, "+10.0000"), (1.10, "+20.0000"), (1.25, "+20.0000")]
    lines = recorded(
        *arming(*flat),
        (1.30, "HOLD", "OK"), (1.31, "QZ", "OK"), (1.32, "RUN", "OK"),
        (1.40, "HOLD", "OK"),  # sent for the abort
    )  # fmt: skip
    inputs = [
        operator(0, "environment", **ENVIRONMENT),
        operator(0, "arm"),
        operator(len(lines) - 8, "abort", reason="phantom moved"),  # right after the last poll
    ]
    engine, session_id = replay(lines, inputs, captured_times_s=frozenset({1.251}))
    assert [r.t_s for r in engine.store.readings(session_id)] == [1.251]
    assert engine.store.session(session_id).status == "aborted"


def test_an_input_the_engine_cannot_take_stops_an_exact_replay_naming_it():
    lines = recorded(*arming((1.05, "+10.0000")))
    inputs = [
        operator(0, "environment", **ENVIRONMENT),
        operator(0, "arm"),
        operator(len(lines), "accept"),
    ]
    with pytest.raises(Divergence) as stopped:
        replay(lines, inputs)
    assert f"the recorded accept by operator A (event {len(lines)}" in str(stopped.value)
    assert "cannot set.accept while the sequence is collecting" in str(stopped.value)


def test_the_first_arming_reads_the_original_time_before_any_line():
    assert math.isinf(TrafficFollower(recorded((1.0, "Q?", None)), QUERY_PLAIN).played_t_s)


def test_an_input_reads_the_time_of_the_lines_before_it_not_of_lines_read_since():
    # A pushing electrometer's lines arrive between a command and its answer; the replay reads
    # them with the answer, past an input the original took before they arrived. Reading the
    # time of the latest line seen there, an arming took a later time than the original's.
    follower = TrafficFollower(
        recorded((1.0, "Q?", "Q +1.0000 nC A"), (2.0, "Q?", None)), QUERY_PLAIN
    )
    for line in follower.lines[:3]:
        follower(TrafficDirection(line.direction), line.t_s, line.raw)
    assert follower.played_t_s == follower.lines[2].t_s
    follower.input_position = 1  # the input was recorded after the first line only
    assert follower.played_t_s == follower.lines[0].t_s
    follower.input_position = 0
    assert math.isinf(follower.played_t_s)
    follower.input_position = None
    assert follower.played_t_s == follower.lines[2].t_s
