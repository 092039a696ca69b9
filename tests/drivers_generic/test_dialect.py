"""The simulator speaks each profile's dialect: what it writes, the driver's parser reads back."""

from __future__ import annotations

import pytest
from chargebook.drivers_generic import load_profile
from chargebook.drivers_generic.lines import parse_reading
from chargebook.drivers_generic.simulator.device import SimulatedElectrometer
from chargebook.drivers_generic.simulator.dialect import (
    DialectResponder,
    format_number,
    template_pattern,
)
from chargebook.drivers_generic.simulator.physics import ChamberParameters, ChamberPhysics
from hypothesis import given, settings
from hypothesis import strategies as st

SERIAL_DIALECTS = ["query-plain", "push-exponent", "query-engineering"]


def responder(name: str) -> DialectResponder:
    device = SimulatedElectrometer(ChamberPhysics(ChamberParameters(), seed=1))
    return DialectResponder(load_profile(name), device)


@pytest.mark.parametrize(
    ("value", "number_format", "digits", "text"),
    [
        (20.12346, "plain", 4, "+20.1235"),
        (-2.012345e-08, "exponent", 6, "-2.012345E-08"),
        (2.01234e-08, "engineering", 4, "+20.1234n"),  # SI prefix n = 1e-9
        (-5.123e-10, "engineering", 3, "-512.300p"),  # SI prefix p = 1e-12
        (1.25e-06, "engineering", 2, "+1.25u"),  # SI prefix u = 1e-6
    ],
)
def test_numbers_are_written_in_each_format(value, number_format, digits, text):
    assert format_number(value, number_format, digits) == text


@pytest.mark.parametrize("name", SERIAL_DIALECTS)
@settings(max_examples=100, deadline=None)
@given(charge_nC=st.floats(min_value=-4999, max_value=4999, allow_nan=False))
def test_reading_lines_round_trip_through_the_drivers_parser(name, charge_nC):
    speaker = responder(name)
    profile = speaker.profile
    line = speaker.reading_line(charge_nC, "ok").encode()
    sample = parse_reading(profile.reading, line, 0.0, profile.framing.encoding)
    resolution_nC = 10.0**-profile.reading.digits * (1e3 if name == "query-engineering" else 1.0)
    if name == "push-exponent":  # exponent format: relative resolution
        resolution_nC = max(abs(charge_nC), 1e-12) * 10.0**-profile.reading.digits
    assert sample.charge_nC == pytest.approx(charge_nC, abs=resolution_nC)


def test_templates_become_patterns_that_capture_their_fields():
    pattern = template_pattern("SOUR:VOLT {volts:.1f}")
    assert pattern.fullmatch("SOUR:VOLT -300.0")["volts"] == "-300.0"
    assert pattern.fullmatch("SOUR:VOLTS 1") is None


@pytest.mark.parametrize(
    ("name", "command", "answer"),
    [
        ("query-plain", "BIAS +9999", ["ERR 2"]),
        ("query-plain", "FLY", ["ERR 1"]),
        ("push-exponent", "FLY", ["NAK 10"]),
        ("query-engineering", "HV many", ["#5"]),
        ("query-engineering", "RNG 1", ["#0"]),
    ],
)
def test_the_simulated_instrument_refuses_like_the_profile_says(name, command, answer):
    assert responder(name).respond(command) == answer
