"""The simulated instrument's state machine, with an injected clock: no waiting on the wall."""

from __future__ import annotations

import pytest
from chargebook.drivers_generic.simulator.device import (
    SimulatedElectrometer,
    SimulatorBusy,
    SimulatorInputError,
)
from chargebook.drivers_generic.simulator.physics import ChamberParameters, ChamberPhysics


class FakeClock:
    """A clock the test moves by hand; ``sleep`` moves it too."""

    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now

    def sleep(self, seconds: float) -> None:
        self.now += seconds


def make_device(clock: FakeClock, **parameters) -> SimulatedElectrometer:
    physics = ChamberPhysics(ChamberParameters(**parameters), seed=9)
    return SimulatedElectrometer(
        physics,
        time_scale=0.5,
        temperature_C=20.0,
        pressure_kPa=101.325,
        clock=clock,
        sleep=clock.sleep,
    )


def test_a_delivery_takes_mu_over_dose_rate_times_the_time_scale():
    clock = FakeClock()
    device = make_device(clock, leakage_nC_per_s=0.0)
    device.start()
    started = device.beam(100, 600)
    assert started["duration_s"] == pytest.approx(100 / 600 * 60 * 0.5)  # 5 s of wall time
    clock.now += 2.5
    half, _ = device.read()
    device.wait_for_beam()
    whole, status = device.read()
    assert status == "ok"
    assert half == pytest.approx(whole / 2, rel=1e-12)
    assert whole == pytest.approx(device.last_delivery["charge_nC"], rel=1e-12)
    assert not device.beam_on()


def test_charge_is_collected_only_while_integrating_and_holds_after_stop():
    clock = FakeClock()
    device = make_device(clock, leakage_nC_per_s=0.0)
    device.beam(100)
    device.wait_for_beam()
    assert device.read()[0] == 0.0
    device.start()
    device.beam(100)
    device.wait_for_beam()
    device.stop()
    held = device.read()[0]
    clock.now += 100
    assert device.read()[0] == held
    device.zero()
    assert device.read()[0] == 0.0


def test_leakage_integrates_over_simulated_time():
    clock = FakeClock()
    device = make_device(clock, leakage_nC_per_s=1e-5)
    device.start()
    clock.now += 30.0  # 60 simulated seconds at time scale 0.5
    assert device.read()[0] == pytest.approx(6e-4, rel=1e-9)


def test_overrange_on_the_low_range_reports_full_scale():
    clock = FakeClock()
    device = make_device(clock)
    device.set_range(0)
    device.start()
    device.beam(400)
    device.wait_for_beam()
    assert device.read() == (50.0, "overrange")


def test_a_second_beam_while_one_is_on_is_refused():
    device = make_device(FakeClock())
    device.beam(100)
    with pytest.raises(SimulatorBusy):
        device.beam(100)


@pytest.mark.parametrize(
    ("call", "field"),
    [
        (lambda d: d.beam(0), "mu"),
        (lambda d: d.beam(100, 9000), "dose_rate_MU_per_min"),
        (lambda d: d.beam("many"), "mu"),
        (lambda d: d.set_bias(5000), "volts"),
        (lambda d: d.set_bias(float("nan")), "volts"),
        (lambda d: d.set_environment(temperature_C=80), "temperature_C"),
        (lambda d: d.set_environment(pressure_kPa=20), "pressure_kPa"),
        (lambda d: d.set_range(7), "range"),
    ],
)
def test_bad_requests_name_the_field_and_change_nothing(call, field):
    device = make_device(FakeClock())
    before = device.state()
    with pytest.raises(SimulatorInputError) as refused:
        call(device)
    assert refused.value.field == field
    assert device.state() == before


def test_a_polarity_change_restarts_settling_and_pre_irradiation_ends_it():
    clock = FakeClock()
    device = make_device(clock, noise_relative=0.0, spike_probability=0.0, leakage_nC_per_s=0.0)
    device.set_bias(-300)
    device.beam(100)
    first = device.last_delivery["settling_factor"]
    device.wait_for_beam()
    for _ in range(5):
        device.beam(100)
        device.wait_for_beam()
    later = device.last_delivery["settling_factor"]
    assert first < 0.999 < later


def test_identical_event_sequences_give_identical_charges_whatever_the_clock():
    def run(pause_s: float) -> list[float]:
        clock = FakeClock()
        device = make_device(clock, leakage_nC_per_s=0.0)
        charges = []
        for volts in (300, -300, 100):
            device.set_bias(volts)
            clock.now += pause_s
            device.zero()
            device.start()
            device.beam(100)
            device.wait_for_beam()
            clock.now += pause_s
            device.stop()
            charges.append(device.read()[0])
        return charges

    assert run(0.0) == run(123.4)
