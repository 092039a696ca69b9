"""Protocol-level tests: each shipped profile against scripted (command, reply) pairs.

Each test reads like a page of the instrument's manual: what the driver sends, what the
instrument answers, what the driver makes of it. The dialects are our own invention, so the
reply lines here are the specification (the profile files say the same in TOML); the unit
conversions are SI (1 C = 1e9 nC, n = 1e-9, p = 1e-12: SI prefixes, BIPM SI Brochure).
"""

from __future__ import annotations

import pytest
from chargebook.drivers_generic import ProfileElectrometer, load_profile
from chargebook.drivers_generic.interface import (
    Capability,
    Electrometer,
    InstrumentDisconnected,
    InstrumentReportedError,
    InstrumentTimeout,
    NotSupported,
    ProtocolError,
    ReadingStatus,
    SettingOutOfRange,
)
from chargebook.drivers_generic.transport import DISCONNECT, ScriptedTransport, ScriptMismatch


def scripted(profile_name: str, pairs: list) -> tuple[ProfileElectrometer, ScriptedTransport]:
    """Return a driver for a shipped profile talking to a scripted instrument, opened."""
    profile = load_profile(profile_name)
    transport = ScriptedTransport(profile.framing, pairs, clock=iter(range(1000)).__next__)
    driver = ProfileElectrometer(profile, transport)
    driver.open()
    return driver, transport


def finish(driver: ProfileElectrometer) -> None:
    """Close the driver; the script fails here if any pair was left unused."""
    driver.close()


# -- query-plain: query mode, CR LF, plain decimals in nC, status letter ---------------------------


def test_query_plain_reads_a_charge_in_nC_with_its_status_letter():
    driver, transport = scripted(
        "query-plain",
        [
            ("ID?", "chargebook-sim;QUERY-PLAIN;SIM-EM-0001;1.4.0"),
            ("QZ", "OK"),
            ("RUN", "OK"),
            ("HOLD", "OK"),
            ("Q?", "Q +20.1234 nC A"),
        ],
    )
    identity = driver.identify()
    assert (identity.model, identity.serial, identity.firmware) == (
        "QUERY-PLAIN",
        "SIM-EM-0001",
        "1.4.0",
    )
    driver.zero()
    driver.start_integration()
    driver.stop_integration()
    sample = driver.read_charge()
    assert sample.charge_nC == pytest.approx(20.1234, abs=1e-12)
    assert sample.status is ReadingStatus.OK
    assert transport.sent[0] == b"ID?\r\n"  # CR LF terminator from the profile
    finish(driver)


def test_query_plain_sets_bias_signed_and_refuses_beyond_500_V_before_the_wire():
    driver, transport = scripted("query-plain", [("BIAS -300", "OK"), ("RNG LO", "OK")])
    driver.set_bias(-300)
    driver.set_range("LO")
    with pytest.raises(SettingOutOfRange) as refused:
        driver.set_bias(-650)
    assert (refused.value.field, refused.value.value) == ("volts", -650)
    assert "-500" in refused.value.allowed and "500" in refused.value.allowed
    with pytest.raises(SettingOutOfRange, match="LO, HI"):
        driver.set_range("MID")
    with pytest.raises(SettingOutOfRange):
        driver.set_bias(float("nan"))
    assert len(transport.sent) == 2  # nothing refused reached the wire
    finish(driver)


def test_query_plain_overrange_letter_becomes_an_overrange_sample():
    driver, _ = scripted("query-plain", [("Q?", "Q +99.9999 nC O")])
    assert driver.read_charge().status is ReadingStatus.OVERRANGE
    finish(driver)


def test_query_plain_error_reply_names_the_code_and_its_meaning():
    driver, _ = scripted("query-plain", [("RUN", "ERR 3")])
    with pytest.raises(InstrumentReportedError, match=r"error 3 \(not allowed while integrating\)"):
        driver.start_integration()
    finish(driver)


def test_query_plain_resends_on_silence_then_times_out_after_its_retries():
    # timeout_s = 1.0, retries = 2 in query-plain.toml: three attempts, then InstrumentTimeout.
    driver, _ = scripted("query-plain", [("Q?", None), ("Q?", None), ("Q?", None)])
    with pytest.raises(InstrumentTimeout, match="3 attempt"):
        driver.read_charge()
    finish(driver)


def test_query_plain_answers_after_one_silence():
    driver, _ = scripted("query-plain", [("Q?", None), ("Q?", "Q -0.0012 nC A")])
    assert driver.read_charge().charge_nC == pytest.approx(-0.0012, abs=1e-12)
    finish(driver)


@pytest.mark.parametrize(
    "reply",
    [
        b"Q +nan nC A\r\n",
        b"Q +inf nC A\r\n",
        b"Q +20.1234 nC Z\r\n",  # a status letter the profile does not know
        b"Q +20.12\xff4 nC A\r\n",  # not ASCII
        b"Q +20.1234 pC A\r\n",  # a unit the pattern does not allow
        b"garbled \x00\x01\r\n",
    ],
)
def test_query_plain_rejects_a_bad_reading_line_with_the_line_attached(reply):
    driver, _ = scripted("query-plain", [("Q?", reply)])
    with pytest.raises(ProtocolError) as rejected:
        driver.read_charge()
    assert rejected.value.line == reply[:-2]
    finish(driver)


def test_query_plain_over_long_reply_is_refused_not_buffered():
    # max_line_bytes = 128 in query-plain.toml; the instrument babbles 300 bytes, no terminator.
    driver, _ = scripted("query-plain", [("Q?", b"Q" * 300)])
    with pytest.raises(ProtocolError, match="longer than 128 bytes") as rejected:
        driver.read_charge()
    assert len(rejected.value.line) == 128
    finish(driver)


def test_a_partial_reply_times_out_and_is_recorded_as_traffic_at_close():
    seen = []
    profile = load_profile("query-plain")
    transport = ScriptedTransport(
        profile.framing,
        [("Q?", b"Q +20.12"), ("Q?", None), ("Q?", None)],
        traffic=lambda direction, t_s, raw: seen.append((direction.value, raw)),
    )
    driver = ProfileElectrometer(profile, transport)
    driver.open()
    with pytest.raises(InstrumentTimeout):
        driver.read_charge()
    driver.close()
    assert ("rx", b"Q +20.12") in seen


# -- push-exponent: push mode, LF, exponent in coulombs, status word -------------------------------


def test_push_exponent_streams_samples_and_marks_the_end_of_beam_reading_complete():
    driver, _ = scripted(
        "push-exponent",
        [
            ("ZQ", "ACK ZQ"),
            ("GO", "ACK GO"),
            (None, ["S t=0.100 q=+1.000000E-09 C OK", "S t=0.200 q=+1.002000E-08 C OK"]),
            (None, "E t=0.300 q=+2.012345E-08 C OK"),
        ],
    )
    driver.zero()
    driver.start_integration()
    samples = [driver.next_sample(0.5) for _ in range(3)]
    # 1.000000E-09 C = 1.0 nC; 2.012345E-08 C = 20.12345 nC (SI prefixes)
    assert [s.charge_nC for s in samples] == pytest.approx([1.0, 10.02, 20.12345], abs=1e-9)
    assert [s.complete for s in samples] == [False, False, True]
    assert driver.next_sample(0.0) is None
    finish(driver)


def test_push_exponent_keeps_samples_that_arrive_while_it_waits_for_an_ack():
    driver, _ = scripted(
        "push-exponent",
        [("HALT", ["S t=1.000 q=+1.500000E-08 C OK", "garbage", "ACK HALT"])],
    )
    driver.stop_integration()
    assert driver.next_sample(0.0).charge_nC == pytest.approx(15.0, abs=1e-9)
    with pytest.raises(ProtocolError):  # the rejected line is not lost either
        driver.next_sample(0.0)
    assert driver.next_sample(0.0) is None
    finish(driver)


def test_push_exponent_fault_and_over_words_map_to_statuses():
    driver, _ = scripted(
        "push-exponent",
        [(None, ["S t=1.000 q=+5.000000E-06 C OVER", "S t=1.100 q=+0.000000E+00 C FAULT"])],
    )
    assert driver.next_sample(0.0).status is ReadingStatus.OVERRANGE
    assert driver.next_sample(0.0).status is ReadingStatus.ERROR
    finish(driver)


def test_push_exponent_cannot_set_bias_so_the_operator_must():
    driver, transport = scripted("push-exponent", [])
    assert Capability.SET_BIAS not in driver.capabilities
    with pytest.raises(NotSupported, match="by hand"):
        driver.set_bias(300)
    with pytest.raises(NotSupported):
        driver.read_charge()
    assert transport.sent == []
    finish(driver)


def test_push_exponent_nak_is_an_instrument_error():
    driver, _ = scripted("push-exponent", [("GO", "NAK 10")])
    with pytest.raises(InstrumentReportedError, match="unknown command"):
        driver.start_integration()
    finish(driver)


# -- query-engineering: query mode, CR, engineering suffixes, numeric status -----------------------


@pytest.mark.parametrize(
    ("reply", "charge_nC", "status"),
    [
        ("+20.1234nC,0", 20.1234, ReadingStatus.OK),  # n = 1e-9: 20.1234 nC
        ("-512.3000pC,0", -0.5123, ReadingStatus.OK),  # p = 1e-12: 512.3 pC = 0.5123 nC
        ("+1.2500uC,1", 1250.0, ReadingStatus.OVERRANGE),  # u = 1e-6: 1.25 uC = 1250 nC
        ("+0.0000pC,3", 0.0, ReadingStatus.BUSY),
    ],
)
def test_query_engineering_reads_engineering_suffixes(reply, charge_nC, status):
    driver, _ = scripted("query-engineering", [("CHG?", reply)])
    sample = driver.read_charge()
    assert sample.charge_nC == pytest.approx(charge_nC, rel=1e-12, abs=1e-15)
    assert sample.status is status
    finish(driver)


def test_query_engineering_confirms_with_hash_zero_and_refuses_with_a_code():
    driver, transport = scripted(
        "query-engineering",
        [
            ("IDN", "chargebook-sim,QUERY-ENGINEERING,SIM-EM-0001,0.1.0"),
            ("HV -100.0", "#0"),
            ("ACQ 1", "#5"),
        ],
    )
    assert driver.identify().serial == "SIM-EM-0001"
    driver.set_bias(-100)
    with pytest.raises(InstrumentReportedError, match="value out of range"):
        driver.start_integration()
    assert transport.sent[1] == b"HV -100.0\r"  # CR terminator from the profile
    finish(driver)


# -- scpi-generic: no answer to settings, error queue read after each ------------------------------


def test_scpi_reads_the_error_queue_after_every_setting():
    driver, _ = scripted(
        "scpi-generic",
        [
            ("*IDN?", "chargebook-sim,SIM-SCPI,SIM-EM-0001,0.1.0"),
            ("SOUR:VOLT 300.0", None),
            ("SYST:ERR?", '0,"No error"'),
            ("OUTP ON", None),
            ("SYST:ERR?", '0,"No error"'),
            ("INIT", None),
            ("SYST:ERR?", '0,"No error"'),
            ("FETC?", "+2.012345E-08"),
        ],
    )
    assert driver.identify().manufacturer == "chargebook-sim"
    driver.set_bias(300)
    driver.start_integration()
    assert driver.read_charge().charge_nC == pytest.approx(20.12345, rel=1e-12)
    finish(driver)


def test_scpi_raises_every_queued_error_after_a_setting():
    # IEEE 488.2 / SCPI-99 standard error numbers: -113 undefined header, -222 data out of range.
    driver, _ = scripted(
        "scpi-generic",
        [
            ("CHAR:CLE", None),
            ("SYST:ERR?", '-113,"Undefined header"'),
            ("SYST:ERR?", '-222,"Data out of range"'),
            ("SYST:ERR?", '0,"No error"'),
        ],
    )
    with pytest.raises(InstrumentReportedError) as raised:
        driver.zero()
    assert "-113,Undefined header" in str(raised.value)
    assert "-222,Data out of range" in str(raised.value)
    finish(driver)


def test_scpi_overrange_value_9_9E37_is_an_overrange_sample():
    # 9.9E37 is SCPI's overrange value (SCPI-99 Vol. 1, 7.2.1.5 "overrange").
    driver, _ = scripted("scpi-generic", [("FETC?", "+9.900000E+37")])
    assert driver.read_charge().status is ReadingStatus.OVERRANGE
    finish(driver)


def test_scpi_query_without_answer_consults_the_error_queue():
    driver, _ = scripted(
        "scpi-generic",
        [
            ("FETC?", None),
            ("FETC?", None),
            ("SYST:ERR?", '-230,"Data corrupt or stale"'),
            ("SYST:ERR?", '0,"No error"'),
        ],
    )
    with pytest.raises(InstrumentReportedError, match="-230"):
        driver.read_charge()
    finish(driver)


def test_a_mute_scpi_instrument_times_out_after_one_round_of_error_queries():
    # It answered neither the query nor SYST:ERR?: the error query is not asked about itself
    # again (it used to recurse until RecursionError killed the instrument thread).
    driver, transport = scripted(
        "scpi-generic",
        [("FETC?", None), ("FETC?", None), ("SYST:ERR?", None), ("SYST:ERR?", None)],
    )
    with pytest.raises(InstrumentTimeout, match="SYST:ERR"):
        driver.read_charge()
    assert len(transport.sent) == 4
    finish(driver)


# -- every profile ---------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "name", ["query-plain", "push-exponent", "query-engineering", "scpi-generic"]
)
def test_every_profile_driver_satisfies_the_electrometer_interface(name):
    driver, _ = scripted(name, [])
    assert isinstance(driver, Electrometer)
    finish(driver)


def test_a_disconnect_becomes_instrument_disconnected_and_open_again_fails_while_gone():
    driver, _ = scripted("query-plain", [("Q?", DISCONNECT)])
    with pytest.raises(InstrumentDisconnected):
        driver.read_charge()
    with pytest.raises(InstrumentDisconnected):
        driver.open()


def test_the_script_refuses_an_unexpected_command_and_reports_unused_pairs():
    driver, _ = scripted("query-plain", [("QZ", "OK"), ("RUN", "OK")])
    with pytest.raises(ScriptMismatch, match="expects 'QZ'"):
        driver.start_integration()
    driver.zero()
    with pytest.raises(ScriptMismatch, match="unused"):
        driver.close()
