"""The simulated electrometer in this process, on the in-memory wire and a hand clock.

The real driver reads the simulator's dialect with no pty between them, and instrument time
moves only when the test advances it: a delivery is half collected at half its duration, the
cable is pulled between two exchanges. Expected charges come from the simulator's ``truth``
through the definitions of the factors (TRS-398, as in test_end_to_end.py); the real wires keep
their own tests there.
"""

from __future__ import annotations

import threading

import pytest
from chargebook.drivers_generic import reconnect
from chargebook.drivers_generic.interface import InstrumentDisconnected, ReadingStatus
from chargebook.drivers_generic.simulator.hand_clock import HandClock
from chargebook.drivers_generic.simulator.memory_wire import in_process_electrometer

from .test_end_to_end import NOISE_BOUND, expected_charge_nC

MU = 100.0
DOSE_RATE_MU_PER_MIN = 600.0  # a common photon dose rate: 100 MU take 10 s


@pytest.mark.parametrize("profile", ["query-plain", "query-engineering"])
def test_a_delivery_is_collected_as_the_hand_clock_moves_through_it(profile):
    clock = HandClock()
    sim = in_process_electrometer(profile, seed=11, clock=clock, pause=clock.pause)
    traffic = []
    sim.wire.traffic = lambda direction, t_s, raw: traffic.append((direction.value, t_s))
    sim.driver.open()
    sim.driver.zero()
    sim.driver.start_integration()
    duration_s = sim.device.beam(MU, DOSE_RATE_MU_PER_MIN)["duration_s"]
    assert duration_s == pytest.approx(10.0)  # 100 MU / 600 MU/min, time scale 1
    assert sim.driver.read_charge().charge_nC == pytest.approx(0.0, abs=1e-3)  # no time passed
    clock.advance(duration_s / 2)
    half = sim.driver.read_charge()
    clock.advance(duration_s / 2)
    whole = sim.driver.read_charge()
    expected = expected_charge_nC(sim.device.truth(), MU)
    assert whole.status is ReadingStatus.OK
    assert whole.charge_nC == pytest.approx(expected, rel=NOISE_BOUND)
    assert half.charge_nC == pytest.approx(whole.charge_nC / 2, rel=1e-3)
    assert whole.t_s - half.t_s == duration_s / 2  # stamped on the hand clock
    assert {direction for direction, _ in traffic} == {"tx", "rx"}
    assert max(t_s for _, t_s in traffic) == clock()


def test_pushed_lines_come_only_as_the_clock_moves_and_the_last_one_is_complete():
    clock = HandClock()
    sim = in_process_electrometer("push-exponent", seed=3, clock=clock, pause=clock.pause)
    sim.driver.open()
    sim.driver.zero()
    sim.driver.start_integration()
    sim.device.beam(MU, DOSE_RATE_MU_PER_MIN)
    while sim.driver.next_sample(0.0) is not None:  # what was due at the start
        pass
    assert sim.driver.next_sample(0.01) is None  # time stands still: nothing more comes
    clock.advance(10.0)
    samples = []
    while (sample := sim.driver.next_sample(0.01)) is not None:
        samples.append(sample)
    assert samples and samples[-1].complete
    expected = expected_charge_nC(sim.device.truth(), MU)
    assert samples[-1].charge_nC == pytest.approx(expected, rel=NOISE_BOUND)


def test_an_unplugged_cable_is_a_disconnection_until_it_is_plugged_back():
    clock = HandClock()
    sim = in_process_electrometer("query-plain", clock=clock, pause=clock.pause)
    sim.driver.open()
    assert sim.driver.identify().serial == "SIM-EM-0001"
    sim.wire.unplug()
    with pytest.raises(InstrumentDisconnected, match="cable"):
        sim.driver.identify()
    with pytest.raises(InstrumentDisconnected, match="unplugged"):
        reconnect(sim.driver, attempts=2, backoff_s=0.0)
    sim.wire.plug()
    assert reconnect(sim.driver, attempts=2, backoff_s=0.0) == 1
    assert sim.driver.identify().model == "QUERY-PLAIN"


def test_the_hand_clock_refuses_to_go_back_and_a_pause_ends_when_it_moves():
    clock = HandClock(start_s=5.0)
    with pytest.raises(ValueError, match="seconds = -1"):
        clock.advance(-1)
    assert clock.advance(2.5) == 7.5 == clock()
    seen: list[float] = []
    waiter = threading.Thread(target=lambda: (clock.pause(600.0), seen.append(clock())))
    waiter.start()
    while not seen:  # advance until the waiter has woken (it may start after the first move)
        clock.advance(1.0)
        waiter.join(0.05)
    waiter.join()
    assert seen[0] > 7.5
