"""The engine's time, as a replay needs it: decided by samples, arming times recorded.

A reading ends with the sample that completes it and takes that sample's receive time, so every
reading is the value of one raw line; the clock is read only to arm a reading, and that time is
recorded. The beam shape (charge rising, then flat) is common practice for an integrating
electrometer; the times are invented round numbers.
"""

from __future__ import annotations

from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import Store
from chargebook.acquire.session.plan import CaptureRule, Plan, Step
from chargebook.drivers_generic.interface import Capability

CAPABILITIES = {Capability.ZERO, Capability.INTEGRATE, Capability.READ_CHARGE, Capability.SET_BIAS}
PLAN = Plan(
    "timing",
    (
        Step("leakage", "leakage", 1, 300.0, 1, 0.0, duration_s=5.0),
        Step("routine", "routine", 1, 300.0, 2, 100.0),
    ),
    300.0,
    capture=CaptureRule(hold_s=1.0),
)


class Clock:
    """A hand-driven clock in seconds."""

    def __init__(self) -> None:
        self.now = 500.0

    def __call__(self) -> float:
        return self.now


def started(**kwargs) -> tuple[Engine, Clock, int]:
    clock = Clock()
    engine = Engine(
        Store.memory(), capabilities=CAPABILITIES, clock=clock, profile="query-plain", **kwargs
    )
    session_id = engine.start_session(demo_metadata(), PLAN, actor="operator A")
    engine.set_environment(21.0, 101.0, actor="operator A")
    return engine, clock, session_id


def sample(engine: Engine, t_s: float, charge_nC: float, line: bytes | None = None) -> None:
    """Record the raw line the sample came from, then feed the sample with the line's row id
    (as the daemon does)."""
    line_id = None
    if line is not None:
        line_id = engine.store.add_traffic(engine.session_id, t_s, "rx", line)
    engine.on_sample(t_s, charge_nC, line_id=line_id)


def into_routine(engine: Engine, clock: Clock) -> None:
    """Take and accept the leakage set: samples every second until its 5 s are over."""
    engine.arm()
    for second in range(1, 7):
        sample(engine, clock.now + second, 0.0001 * second)
    engine.accept()


def test_the_session_records_its_profile_and_time_scale():
    engine, _, session_id = started(time_scale=0.02)
    details = [
        e.detail() for e in engine.store.events(session_id) if e.kind == EventKind.ACQUISITION
    ]
    assert details == [{"profile": "query-plain", "time_scale": 0.02}]


def test_a_tick_past_the_hold_time_does_not_end_the_reading_the_next_sample_does():
    engine, clock, session_id = started()
    into_routine(engine, clock)
    clock.now = 600.0
    engine.arm()
    for t_s, charge in [(600.1, 0.0), (600.2, 10.0), (600.3, 20.0), (600.4, 20.0)]:
        sample(engine, t_s, charge)
    engine.tick(605.0)  # long past the 1 s hold: nothing is captured without a sample
    routine = [r for r in engine.store.readings(session_id) if r.set_id != 1]
    assert routine == [] and engine.reading is not None
    sample(engine, 605.25, 20.0, b"Q +20.0000 nC A\r\n")
    (reading,) = [r for r in engine.store.readings(session_id) if r.set_id != 1]
    assert (reading.t_s, reading.charge_nC) == (605.25, 20.0)


def test_a_reading_records_when_it_was_armed_and_links_to_its_raw_line():
    engine, clock, session_id = started()
    into_routine(engine, clock)
    clock.now = 700.0
    engine.arm()
    for t_s, charge in [(700.1, 10.0), (700.2, 19.0), (700.3, 19.0)]:
        sample(engine, t_s, charge)
    sample(engine, 701.3, 19.0, b"Q +19.0000 nC A\r\n")
    reading = engine.store.readings(session_id)[-1]
    event = [
        e.detail() for e in engine.store.events(session_id) if e.kind == EventKind.READING_RECORDED
    ]
    assert event[-1]["armed_t_s"] == 700.0
    assert event[-1]["integration_s"] == 701.3 - 700.0
    line = {row.id: row for row in engine.store.traffic(session_id)}[reading.traffic_id]
    assert (line.t_s, line.line) == (701.3, b"Q +19.0000 nC A\r\n")


def test_timed_leakage_ends_with_the_first_sample_after_its_duration():
    engine, _clock, session_id = started()
    engine.arm()  # armed at 500 s for 5 s
    for t_s in (501.0, 503.0, 504.9):
        sample(engine, t_s, 0.0002)
    engine.tick(520.0)
    assert engine.store.readings(session_id) == []
    sample(engine, 505.4, 0.0003)
    (leakage,) = engine.store.readings(session_id)
    assert (leakage.t_s, leakage.charge_nC) == (505.4, 0.0003)


def test_a_manual_capture_takes_the_latest_sample_and_its_time():
    engine, clock, session_id = started()
    into_routine(engine, clock)
    engine.arm()
    sample(engine, clock.now + 0.2, 7.5, b"Q +7.5000 nC A\r\n")
    clock.now += 30.0  # the operator captures much later: the reading is the sample's
    engine.capture(actor="operator A")
    reading = engine.store.readings(session_id)[-1]
    assert (reading.capture, reading.charge_nC, reading.t_s) == ("manual", 7.5, 500.2)
    assert reading.traffic_id is not None
