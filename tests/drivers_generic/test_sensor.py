"""Environment sensors read through a profile (issue 14 item 4): the query dialect scripted as
its manual would read, a push dialect, unit conversions against their definitions, lines that
do not match refused, and the simulated thermometer-barometer on its own real pty."""

from __future__ import annotations

import dataclasses
import json
import subprocess
import sys

import pytest
from chargebook.drivers_generic import available_profiles
from chargebook.drivers_generic.interface import InstrumentTimeout, ProtocolError
from chargebook.drivers_generic.profile import ProfileError
from chargebook.drivers_generic.sensor import (
    EnvironmentSensor,
    available_sensor_profiles,
    load_sensor_profile,
    open_sensor,
)
from chargebook.drivers_generic.simulator.control import SimulatorControl
from chargebook.drivers_generic.simulator.sensor_dialect import (
    PRESSURE_ERROR_KPA,
    SENSOR_SERIAL,
    TEMPERATURE_ERROR_C,
)
from chargebook.drivers_generic.transport import ScriptedTransport

PLAIN = load_sensor_profile("sensor-plain")


def _sensor(pairs, profile=PLAIN) -> EnvironmentSensor:
    return EnvironmentSensor(profile, ScriptedTransport(profile.framing, pairs))


def test_the_sensor_profile_is_its_own_kind_of_profile() -> None:
    assert available_sensor_profiles() == ["sensor-plain"]
    assert "sensor-plain" not in available_profiles()  # not an electrometer
    with pytest.raises(ProfileError, match="one of sensor-plain"):
        load_sensor_profile("query-plain")


def test_a_query_sensor_is_asked_who_it_is_then_each_quantity() -> None:
    sensor = _sensor(
        [
            ("WHO?", "sensor-sim,SIM-TP-0001"),
            ("TEMP?", "T +21.40 C"),
            ("PRES?", "P 1008.5 hPa"),
        ]
    )
    with sensor:
        reading = sensor.read()
    assert reading.serial == "SIM-TP-0001"
    assert reading.temperature_C == 21.40
    assert reading.pressure_kPa == pytest.approx(100.85, abs=1e-12)  # 1 hPa = 0.1 kPa (SI)
    assert reading.written == {"temperature": "+21.40 C", "pressure": "1008.5 hPa"}


def test_units_are_converted_by_their_definitions_and_unknown_ones_refused() -> None:
    from chargebook.drivers_generic.sensor import _converted

    # 760 mmHg is one standard atmosphere, 101.325 kPa; 0 °C is 273.15 K (SI definitions)
    assert _converted("pressure", "760", "mmHg", "P 760 mmHg") == pytest.approx(101.325)
    assert _converted("temperature", "294.65", "K", "T 294.65 K") == pytest.approx(21.5)
    assert _converted("pressure", "1013.25", "mbar", "P") == pytest.approx(101.325)
    with pytest.raises(ProtocolError, match="pressure in unit 'C' is not known"):
        _converted("pressure", "21", "C", "P 21 C")


def test_a_push_sensor_is_read_from_its_stream_and_silence_times_out() -> None:
    push = dataclasses.replace(
        PLAIN,
        mode="push",
        quantities=tuple(dataclasses.replace(q, query=None) for q in PLAIN.quantities),
        timing=dataclasses.replace(PLAIN.timing, timeout_s=0.2, retries=0),
    )
    sensor = _sensor(
        [
            ("WHO?", "sensor-sim,SIM-TP-0002"),
            (None, ["P 1000.0 hPa", "T +20.00 C", "P 1001.0 hPa"]),
        ],
        push,
    )
    with sensor:
        reading = sensor.read()
        assert (reading.temperature_C, reading.pressure_kPa) == (20.0, pytest.approx(100.1))
        with pytest.raises(InstrumentTimeout):
            sensor.read()


def test_the_simulated_sensor_reads_the_bench_air_with_its_own_error(tmp_path) -> None:
    """Closed loop on a real pty: the simulator's thermometer-barometer reads the air the
    bench set, off by its fixed error (what the certificate correction puts right)."""
    process = subprocess.Popen(
        [sys.executable, "-m", "chargebook", "simulate", "--serial"],
        stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
    )  # fmt: skip
    try:
        info = json.loads(process.stdout.readline())
        with SimulatorControl(info["control"]) as bench:
            bench.set_environment(temperature_C=23.0, pressure_kPa=99.2)
        with open_sensor(info["sensor_profile"], port=info["sensor"]) as sensor:
            reading = sensor.read()
    finally:
        process.terminate()
        process.wait(timeout=30)
    assert reading.serial == SENSOR_SERIAL
    assert reading.temperature_C == pytest.approx(23.0 + TEMPERATURE_ERROR_C, abs=0.005)
    assert reading.pressure_kPa == pytest.approx(99.2 + PRESSURE_ERROR_KPA, abs=0.005)
