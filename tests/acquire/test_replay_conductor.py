"""The replay's loop without processes: the real query-plain driver over a scripted transport (the
recorded lines, as the instrument's side), the real engine, an in-memory store.

The recordings are written here line by line with their input logs, as the daemon would have
recorded them, so that the moments the daemon leaves to chance (a stale poll the engine never
took, a sample that reaches the engine just after the operator's abort) are there every time.
Charges and times are invented round numbers.
"""

from __future__ import annotations

import dataclasses

import pytest
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.engine import inputs
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import Store
from chargebook.acquire.replay.conductor import Conductor, Pacer
from chargebook.acquire.replay.recording import LoggedInput, RecordedLine, Recording
from chargebook.acquire.replay.traffic import Divergence, TrafficFollower, line_bytes
from chargebook.acquire.session.plan import CaptureRule, Plan, Step
from chargebook.corrections.stability import Thresholds
from chargebook.drivers_generic import ProfileElectrometer, load_profile
from chargebook.drivers_generic.transport import ScriptedTransport

QUERY_PLAIN = load_profile("query-plain")
PLAN = Plan(
    "one-set",
    (Step("routine", "routine", 1, 300.0, 2, 100.0),),
    300.0,
    capture=CaptureRule(hold_s=0.1),
)
ENVIRONMENT = inputs.EnterEnvironment(
    temperature_C=21.5, pressure=100.8, source="bench", actor="operator A", clock_s=0.5
)


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


def replay(lines: tuple[RecordedLine, ...], logged: list[LoggedInput]) -> tuple[Engine, int]:
    """Play ``lines`` and the ``logged`` inputs through the driver and the engine; return both."""
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

    def new_engine() -> Engine:
        return Engine(store, capabilities=QUERY_PLAIN.capabilities, profile="query-plain")

    engine = new_engine()
    start = inputs.StartSession(metadata=demo_metadata(), plan=PLAN, actor="operator A")
    session_id = engine.apply(dataclasses.replace(start, clock_s=0.0))
    follower.attach(store, session_id)
    recording = Recording(
        session=store.session(session_id),
        thresholds=Thresholds(),
        profile="query-plain",
        time_scale=1.0,
        lines=lines,
        start=start,
        inputs=tuple(logged),
        places=(),
    )
    driver.open()
    Conductor(
        engine,
        driver,
        follower,
        recording,
        strict=True,
        pacer=Pacer(0),
        actor=lambda actor: f"{actor} (replayed)",
        restart=new_engine,
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


def operator(position: int, given: inputs.Input, input_id: int = 0) -> LoggedInput:
    return LoggedInput(position, given, input_id)


def sample(lines: tuple[RecordedLine, ...], index: int, clock_s: float) -> LoggedInput:
    """Return the logged sample of line ``index`` (a poll's answer), as the daemon logged it."""
    text = lines[index].raw.decode()
    charge_nC = float(text.split()[1])
    given = inputs.Sample(
        t_s=lines[index].t_s, charge_nC=charge_nC, line_id=index + 1, clock_s=clock_s
    )
    return LoggedInput(index + 1, given, input_id=100 + index, line=index)


def answers_of(lines: tuple[RecordedLine, ...], *times_s: float) -> list[int]:
    """Return the indexes of the answers to the polls sent at ``times_s``."""
    return [line.index + 1 for line in lines if line.direction == "tx" and line.t_s in times_s]


def test_readings_are_taken_from_the_logged_samples_read_again_by_the_driver():
    flat = [(1.05, "+10.0000"), (1.10, "+20.0000"), (1.15, "+20.0000"), (1.25, "+20.0000")]
    lines = recorded(*arming(*flat), (1.30, "HOLD", "OK"))
    arm = inputs.Arm(actor="operator A", clock_s=0.99)
    logged = [operator(0, ENVIRONMENT), operator(0, arm)]
    logged += [sample(lines, i, clock_s=2.0) for i in answers_of(lines, 1.05, 1.10, 1.15, 1.25)]
    engine, session_id = replay(lines, logged)
    readings = engine.store.readings(session_id)
    assert [(r.charge_nC, r.t_s) for r in readings] == [(20.0, 1.251)]
    events = [
        e.detail() for e in engine.store.events(session_id) if e.kind == EventKind.READING_RECORDED
    ]
    assert [e["armed_t_s"] for e in events] == [0.99]  # the logged arm's clock
    # the reading names the line the replay wrote for the sample it was taken at
    line = {t.id: t for t in engine.store.traffic(session_id)}[readings[0].traffic_id]
    assert line.line == b"Q +20.0000 nC A\r\n" and line.t_s == 1.251
    assert engine.state.value == "collecting"  # the next reading, armed at the logged clock


def test_a_poll_the_engine_never_took_is_played_and_given_to_nobody():
    flat = [(1.05, "+10.0000"), (1.10, "+20.0000"), (1.25, "+20.0000")]
    lines = recorded(
        *arming(*flat),
        (1.27, "Q?", "Q +99.0000 nC A"),  # polled, but stale for the daemon: not logged
        (1.30, "HOLD", "OK"),
    )  # fmt: skip
    logged = [operator(0, ENVIRONMENT), operator(0, inputs.Arm(actor="op", clock_s=0.99))]
    logged += [sample(lines, i, clock_s=2.0) for i in answers_of(lines, 1.05, 1.10, 1.25)]
    engine, session_id = replay(lines, logged)
    assert [r.charge_nC for r in engine.store.readings(session_id)] == [20.0]
    assert len(engine.store.traffic(session_id)) == len(lines)  # every line played


def test_a_sample_logged_before_the_abort_reaches_the_engine_before_it_and_none_after():
    flat = [(1.05, "+10.0000"), (1.10, "+20.0000"), (1.25, "+20.0000")]
    lines = recorded(*arming(*flat), (1.30, "HOLD", "OK"))
    # the last poll would end the reading, but the operator's abort reached the engine first:
    # its sample was never given to the engine, so it is not in the log
    logged = [operator(0, ENVIRONMENT), operator(0, inputs.Arm(actor="op", clock_s=0.99))]
    logged += [sample(lines, i, clock_s=2.0) for i in answers_of(lines, 1.05, 1.10)]
    logged.append(operator(len(lines) - 2, inputs.Abort(reason="phantom moved", confirm=True)))
    engine, session_id = replay(lines, logged)
    assert engine.store.readings(session_id) == []
    assert engine.store.session(session_id).status == "aborted"


def test_a_logged_sample_the_driver_reads_differently_stops_an_exact_replay_naming_it():
    flat = [(1.05, "+10.0000"), (1.10, "+20.0000")]
    lines = recorded(*arming(*flat))
    logged = [operator(0, ENVIRONMENT), operator(0, inputs.Arm(actor="op", clock_s=0.99))]
    first, second = (sample(lines, i, clock_s=2.0) for i in answers_of(lines, 1.05, 1.10))
    changed = dataclasses.replace(second.given, charge_nC=20.5)
    with pytest.raises(Divergence) as stopped:
        replay(lines, [*logged, first, dataclasses.replace(second, given=changed)])
    assert str(stopped.value) == (
        f"the logged sample (input {second.input_id}, traffic line {second.line + 1}) has "
        "charge_nC = 20.5; the driver read 20.0 from the played-back line"
    )


def test_an_input_the_engine_cannot_take_stops_an_exact_replay_naming_it():
    lines = recorded(*arming((1.05, "+10.0000")))
    logged = [
        operator(0, ENVIRONMENT),
        operator(0, inputs.Arm(actor="operator A", clock_s=0.99)),
        operator(len(lines), inputs.Accept(actor="operator A", clock_s=2.0), input_id=7),
    ]
    with pytest.raises(Divergence) as stopped:
        replay(lines, logged)
    assert f"the logged accept by operator A (input 7, after traffic line {len(lines)})" in str(
        stopped.value
    )
    assert "cannot set.accept while the sequence is collecting" in str(stopped.value)


def test_a_logged_sample_after_the_engine_ended_its_readings_stops_an_exact_replay_naming_it():
    # Two readings of the set, each flat for the hold time, then one poll more logged as a
    # sample: the engine that recorded this was still taking a reading there, the replayed
    # one had ended both. Polls in flight or not, that is a divergence, not a sample ignored.
    first = [(1.05, "+10.0000"), (1.10, "+20.0000"), (1.15, "+20.0000"), (1.25, "+20.0000")]
    second = [(1.30, "+30.0000"), (1.35, "+40.0000"), (1.40, "+40.0000"), (1.50, "+40.0000")]
    lines = recorded(*arming(*first, *second, (1.55, "+40.0000")))
    logged = [operator(0, ENVIRONMENT), operator(0, inputs.Arm(actor="op", clock_s=0.99))]
    polls = answers_of(lines, *(t_s for t_s, _ in [*first, *second, (1.55, "")]))
    logged += [sample(lines, i, clock_s=lines[i].t_s) for i in polls]
    with pytest.raises(Divergence) as stopped:
        replay(lines, logged)
    assert str(stopped.value) == (
        f"the logged sample (input {logged[-1].input_id}, traffic line {polls[-1] + 1}) came "
        "while the replayed engine was no longer taking a reading: it ended the reading "
        "earlier than the recording did"
    )
    engine, session_id = replay(lines, logged[:-1])  # the recording as the engine left it
    assert [r.charge_nC for r in engine.store.readings(session_id)] == [20.0, 40.0]


def test_an_unreadable_answer_among_polls_in_flight_is_named_by_its_own_line():
    # Three polls kept in flight; the recording's third answer (one the engine took, by the
    # log) is not a reading the driver can parse: the replay stops naming that line, not the
    # run's first.
    flat = [(1.05, "+10.0000"), (1.10, "+20.0000"), (1.15, "+2O.0000")]
    lines = recorded(*arming(*flat))
    logged = [operator(0, ENVIRONMENT), operator(0, inputs.Arm(actor="op", clock_s=0.99))]
    polls = answers_of(lines, 1.05, 1.10, 1.15)
    logged += [sample(lines, i, clock_s=2.0) for i in polls[:2]]
    garbled = inputs.Sample(t_s=lines[polls[2]].t_s, charge_nC=20.0, line_id=polls[2] + 1)
    logged.append(LoggedInput(polls[2] + 1, garbled, input_id=102, line=polls[2]))
    with pytest.raises(Divergence) as stopped:
        replay(lines, logged)
    assert str(stopped.value).startswith(
        f"traffic line {polls[2] + 1}, whose sample the engine took, cannot be read by profile "
        "query-plain (line does not match the reading pattern: 'Q +2O.0000 nC A')"
    )
