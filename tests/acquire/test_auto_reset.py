"""An auto-reset electrometer: after pushing a completed reading it zeroes its integrator and
integrates the next one by itself, so the readings of a set follow one another with nothing sent
to it between them (common practice: an electrometer's auto-reset or repeated timed mode).

Checked here against the engine's command stream, the real daemon's sample feed (its socket and
its SQLite file), the simulated instrument, and the profile loader.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest
from chargebook.acquire.daemon.daemon import Daemon
from chargebook.acquire.engine import driver_commands
from chargebook.acquire.engine.engine import Engine
from chargebook.drivers_generic import ProfileError, load_profile
from chargebook.drivers_generic.interface import Capability, Sample
from chargebook.drivers_generic.simulator.device import SimulatedElectrometer
from chargebook.drivers_generic.simulator.dialect import DialectResponder
from chargebook.drivers_generic.simulator.physics import ChamberParameters, ChamberPhysics

from tests.acquire.test_daemon_actions import (
    ACTIONS,
    PUSHED_EVERY_LINE,
    STREAMED_READINGS,
    streaming_daemon,
)
from tests.acquire.test_engine import Clock, make_engine, small_plan, started

PUSHES = {Capability.ZERO, Capability.INTEGRATE, Capability.STREAM, Capability.PUSH_READINGS}
ARMING = [driver_commands.Zero(), driver_commands.StartIntegration()]


def _armed(capabilities: set[Capability]) -> tuple[Engine, Clock]:
    engine, clock = make_engine(capabilities=capabilities, default_plan=small_plan())
    started(engine)
    engine.manual_done()  # no remote bias: set by hand
    engine.arm()
    return engine, clock


def _commands_per_reading(capabilities: set[Capability]) -> list[list[str]]:
    """Push completed readings 20 ms apart until the routine step's set is complete; return
    the commands the engine issued at arming and after each reading, by name."""
    engine, clock = _armed(capabilities)
    issued = [engine.take_commands()]
    while engine.reading is not None:
        clock.now += 0.02
        engine.on_sample(clock.now, 20.0 + 0.01 * len(issued), complete=True)
        issued.append(engine.take_commands())
    assert engine.state.value == "reviewing"
    return [[type(command).__name__ for command in batch] for batch in issued]


def test_an_auto_reset_instrument_is_armed_once_per_set_and_stopped_at_its_end():
    arming, stop = ["Zero", "StartIntegration"], ["StopIntegration"]
    issued = _commands_per_reading(PUSHES | {Capability.AUTO_RESET})
    assert len(issued) >= 4  # a settling reading and three more
    assert issued == [arming, *[[]] * (len(issued) - 2), stop]
    # the same instrument without auto-reset is stopped, zeroed and started between readings
    rearmed = stop + arming
    assert _commands_per_reading(PUSHES) == [arming, *[rearmed] * (len(issued) - 2), stop]


def test_the_next_reading_takes_the_samples_after_the_one_that_completed_the_last():
    engine, clock = _armed(PUSHES | {Capability.AUTO_RESET})
    first_s = clock.now + 1.0
    engine.on_sample(first_s, 20.0, complete=True)
    clock.now += 5.0  # the engine hears of the next sample late (a busy machine)
    # received 20 ms after the first, long before the engine's clock now: it is not stale
    engine.on_sample(first_s + 0.02, 20.1, complete=True)
    readings = engine.store.readings(engine.session_id)
    assert [r.charge_nC for r in readings] == [20.0, 20.1]
    # the second integrated from the first's end: its integration time is the 20 ms between
    assert engine.integration_s[readings[1].id] == pytest.approx(0.02, abs=1e-9)


def test_a_new_set_arms_the_instrument_again():
    engine, clock = _armed(PUSHES | {Capability.AUTO_RESET})
    run = engine.sampling_run
    while engine.reading is not None:
        clock.now += 0.02
        engine.on_sample(clock.now, 20.0, complete=True)
        assert engine.reading is None or engine.sampling_run == run  # the same arming
    assert engine.state.value == "reviewing" and engine.sampling_run is None
    engine.take_commands()
    engine.redo(reason="noisy")
    engine.arm()
    assert engine.take_commands() == ARMING
    assert engine.sampling_run is not None and engine.sampling_run != run


async def test_the_daemon_takes_every_reading_of_one_burst(tmp_path: Path) -> None:
    # One burst of lines read at once (a busy daemon): each line a completed reading. Before,
    # the rest of a burst after a capture was dropped as the old arming's.
    async with streaming_daemon(tmp_path) as (daemon, client):
        for method, params in ACTIONS[:2]:  # start, air
            await client.call(method, **params)
        await client.call("step.manual_done", note="bias set by hand")
        await client.call("step.arm")
        armed_t_s = daemon.engine.reading.armed_t_s
        # invented charges (demo only), 20 ms apart after arming (the daemon's clock)
        burst = [
            Sample(armed_t_s + 0.02 * (n + 1), 20.0 + 0.001 * n, complete=True)
            for n in range(STREAMED_READINGS)
        ]
        _hand_burst(daemon, burst)
        snapshot = await client.wait_for_snapshot(lambda s: s["state"] == "reviewing", 10)
    charges = [reading["charge_nC"] for reading in snapshot["sets"][-1]["readings"]]
    assert charges == [sample.charge_nC for sample in burst]


def _hand_burst(daemon: Daemon, samples: list[Sample]) -> None:
    """Hand the daemon one burst of samples, as the instrument thread does (lines unrecorded)."""
    chunk = (samples, None, [(None, index) for index in range(len(samples))])
    daemon._events.put_nowait(("samples", (daemon._generation, [chunk])))


def _beam(charge_nC: float, start_s: float, completed: bool = True) -> list[Sample]:
    """Return the pushed samples of one beam from ``start_s``: the charge rising to
    ``charge_nC`` (invented, demo only) over 1 s, then its completed line unless lost."""
    rising = [Sample(start_s + 0.1 * n, charge_nC * n / 10) for n in range(1, 11)]
    return rising + ([Sample(start_s + 1.1, charge_nC, complete=True)] if completed else [])


def _reset(start_s: float, count: int = 30) -> list[Sample]:
    """Return the samples of a reset integrator, 0.1 s apart: leakage only (invented)."""
    return [Sample(start_s + 0.1 * n, 0.0001) for n in range(count)]


def _losing_a_line(engine: Engine, feed) -> list[list[str]]:
    """Feed (with ``feed(samples)``) a settling beam, a beam whose completed line is lost on the
    way, the instrument's reset integrator after it, and three more beams; return the commands
    issued after each part, by name."""
    issued = []
    for samples in (
        _beam(20.0, 1001.0),
        _beam(20.1, 1003.0, completed=False),
        _reset(1004.2),
        _beam(20.2, 1008.0),
        _beam(20.3, 1010.0),
        _beam(20.4, 1012.0),
    ):
        feed(samples)
        issued.append([type(command).__name__ for command in engine.take_commands()])
    return issued


@pytest.mark.parametrize("way", ["one at a time", "in runs"])
def test_a_reading_whose_completed_line_is_lost_is_dropped_not_taken_from_the_reset(way):
    # The instrument zeroed itself after the beam, but its completed line never arrived
    # (garbled, refused by the driver): end-of-beam detection took the reset integrator's
    # 0.0001 nC as the reading. It is dropped, said so, and the set goes on with nothing sent.
    engine, clock = _armed(PUSHES | {Capability.AUTO_RESET})
    engine.take_commands()

    def one_at_a_time(samples: list[Sample]) -> None:
        for sample in samples:
            clock.now = sample.t_s
            engine.on_sample(sample.t_s, sample.charge_nC, sample.complete)

    def in_runs(samples: list[Sample]) -> None:  # as the daemon feeds a burst
        clock.now = samples[-1].t_s
        while samples and engine.reading is not None:
            taken = engine.take_samples(samples, [None] * len(samples), clock.now)
            samples = samples[taken:]

    issued = _losing_a_line(engine, one_at_a_time if way == "one at a time" else in_runs)
    readings = engine.store.readings(engine.session_id)
    assert [(r.charge_nC, r.capture) for r in readings] == [
        (20.0, "pushed"),
        (20.2, "pushed"),
        (20.3, "pushed"),
        (20.4, "pushed"),
    ]
    assert issued == [[], [], [], [], [], ["StopIntegration"]]  # armed once, stopped at the end
    events = engine.store.events(engine.session_id)
    (dropped,) = [e.detail() for e in events if e.kind == "reading_dropped"]
    assert dropped == {"why": "completed reading lost", "charge_nC": 20.1}
    # the next reading integrated on from the sample that showed the reset
    assert engine.integration_s[readings[1].id] == pytest.approx(1009.1 - 1004.2, abs=1e-9)
    assert engine.state.value == "reviewing"


def test_a_lost_reading_is_said_to_the_operator():
    engine, clock = _armed(PUSHES | {Capability.AUTO_RESET})
    for sample in _beam(20.1, 1001.0, completed=False) + _reset(1002.2, 2):
        clock.now = sample.t_s
        engine.on_sample(sample.t_s, sample.charge_nC)
    assert engine.store.readings(engine.session_id) == []
    assert engine.reading is not None and engine.state.value == "settling"  # still the first
    assert engine.notice is not None and "(+20.1000 nC so far) was discarded" in engine.notice
    assert "reset itself after it (auto-reset) but its completed reading never" in engine.notice
    assert "Deliver that beam again" in engine.notice


def test_the_simulated_instrument_zeroes_after_each_completed_reading_it_pushes():
    profile = load_profile(str(PUSHED_EVERY_LINE))
    device = SimulatedElectrometer(ChamberPhysics(ChamberParameters(), seed=1))
    speaker = DialectResponder(profile, device)
    device.charge_nC = 20.0  # integrated so far (invented, demo only)
    speaker.flood_line(0)
    assert device.charge_nC == 0.0
    # the same dialect without auto-reset holds its charge
    plain = dataclasses.replace(
        profile, capabilities=profile.capabilities - {Capability.AUTO_RESET}
    )
    device.charge_nC = 20.0
    DialectResponder(plain, device).flood_line(0)
    assert device.charge_nC == 20.0


def test_auto_reset_is_refused_without_pushed_readings(tmp_path: Path) -> None:
    text = Path(load_profile("push-exponent").source).read_text(encoding="utf-8")
    path = tmp_path / "bad.toml"
    path.write_text(text.replace('"push_readings"]', '"auto_reset"]'), encoding="utf-8")
    with pytest.raises(ProfileError) as refused:
        load_profile(path)
    message = str(refused.value)
    assert "profile.capabilities" in message and "auto_reset" in message
    assert "push_readings" in message and "bad.toml" in message
