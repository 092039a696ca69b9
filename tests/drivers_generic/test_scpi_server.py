"""The simulated SCPI instrument: IEEE 488.2 common commands and the error queue."""

from __future__ import annotations

from chargebook.drivers_generic.simulator.device import SimulatedElectrometer
from chargebook.drivers_generic.simulator.physics import ChamberParameters, ChamberPhysics
from chargebook.drivers_generic.simulator.scpi_server import (
    ERROR_QUEUE_LENGTH,
    ScpiResponder,
    short_header,
)


def instrument() -> ScpiResponder:
    return ScpiResponder(SimulatedElectrometer(ChamberPhysics(ChamberParameters(), seed=1)))


def test_idn_has_four_comma_separated_fields():
    # IEEE 488.2 *IDN?: manufacturer, model, serial number, firmware level
    assert len(instrument().respond("*IDN?")[0].split(",")) == 4


def test_an_undefined_header_goes_to_the_queue_as_minus_113_and_cls_clears_it():
    scpi = instrument()
    assert scpi.respond("BOGUS:CMD") == []
    assert scpi.respond("SYST:ERR?") == ['-113,"Undefined header"']  # SCPI-99 error -113
    assert scpi.respond("SYST:ERR?") == ['0,"No error"']
    scpi.respond("BOGUS")
    scpi.respond("*CLS")
    assert scpi.respond("SYST:ERR?") == ['0,"No error"']


def test_long_forms_lower_case_and_semicolons_are_understood():
    assert short_header("syst:error:next?") == "SYST:ERR:NEXT?"
    scpi = instrument()
    assert scpi.respond("source:voltage -150;:OUTPut ON;outp?;SOUR:VOLT?") == [
        "1",
        "-1.500000E+02",
    ]
    assert scpi.device.bias_V == -150


def test_settings_out_of_range_queue_standard_errors():
    scpi = instrument()
    scpi.respond("SOUR:VOLT 5000")
    scpi.respond("SOUR:VOLT lots")
    scpi.respond("CHAR:RANG MEDIUM")
    assert [scpi.respond("SYST:ERR?")[0] for _ in range(4)] == [
        '-222,"Data out of range"',
        '-104,"Data type error"',
        '-224,"Illegal parameter value"',
        '0,"No error"',
    ]


def test_the_queue_is_bounded_and_says_so():
    scpi = instrument()
    for _ in range(3 * ERROR_QUEUE_LENGTH):
        scpi.respond("NOPE")
    entries = [scpi.respond("SYST:ERR?")[0] for _ in range(ERROR_QUEUE_LENGTH + 1)]
    assert entries[-2] == '-350,"Queue overflow"'  # SCPI-99 error -350
    assert entries[-1] == '0,"No error"'


def test_output_off_removes_the_bias_and_on_restores_the_programmed_volts():
    scpi = instrument()
    scpi.respond("OUTP OFF")
    assert scpi.device.bias_V == 0
    scpi.respond("OUTP ON")
    assert scpi.device.bias_V == 300
