"""The line parser: strict numbers, and any bytes become a Sample or a ProtocolError.

Number checks use SI prefixes (f = 1e-15, p = 1e-12, n = 1e-9, u = 1e-6, m = 1e-3, k = 1e3;
BIPM SI Brochure, 9th edition, Table 7) and IEEE 754 float semantics as Python implements them.
"""

from __future__ import annotations

import math

import pytest
from chargebook.drivers_generic import ProfileElectrometer, load_profile
from chargebook.drivers_generic.interface import ProtocolError, Sample
from chargebook.drivers_generic.lines import parse_identity, parse_number, parse_reading
from chargebook.drivers_generic.transport import ScriptedTransport
from hypothesis import given, settings
from hypothesis import strategies as st

PROFILES = ["query-plain", "push-exponent", "query-engineering", "scpi-generic"]
LOADED = {name: load_profile(name) for name in PROFILES}


@pytest.mark.parametrize(
    ("text", "number_format", "value"),
    [
        ("+20.1234", "plain", 20.1234),
        ("-0.5", "plain", -0.5),
        (".5", "plain", 0.5),
        ("+2.012345E-08", "exponent", 2.012345e-08),
        ("1e3", "exponent", 1000.0),
        ("20.1234", "exponent", 20.1234),  # an exponent format may omit the exponent
        ("+20.1234n", "engineering", 20.1234e-9),
        ("-512.3p", "engineering", -512.3e-12),
        ("1.25u", "engineering", 1.25e-6),
        ("3f", "engineering", 3e-15),
        ("2k", "engineering", 2e3),
        ("7", "engineering", 7.0),
    ],
)
def test_numbers_are_read_in_each_format(text, number_format, value):
    assert parse_number(text, number_format) == pytest.approx(value, rel=1e-15)


@pytest.mark.parametrize(
    ("text", "number_format"),
    [
        ("nan", "plain"),
        ("inf", "exponent"),
        ("-Infinity", "exponent"),
        ("1e999", "exponent"),  # overflows to inf in IEEE 754 double
        ("1_000", "plain"),  # Python's float() would accept the underscore
        (
            "١٢",
            "plain",
        ),  # Arabic-Indic digits: float() accepts them, an instrument never sends them
        ("2.0E-08", "plain"),  # an exponent where the profile says plain
        ("12.3x", "engineering"),  # not an SI prefix
        ("", "plain"),
        ("+", "plain"),
        (" 1.0", "plain"),
    ],
)
def test_non_numbers_and_non_finite_values_are_refused(text, number_format):
    with pytest.raises(ProtocolError):
        parse_number(text, number_format)


@pytest.mark.parametrize(
    ("profile_name", "line", "charge_nC"),
    [
        ("query-plain", b"Q -19.6017 nC A", -19.6017),
        ("push-exponent", b"E t=1.488 q=+1.960222E-08 C OK", 19.60222),  # 1 C = 1e9 nC
        ("query-engineering", b"+19.6022nC,0", 19.6022),
        ("scpi-generic", b"-1.960181E-08", -19.60181),
    ],
)
def test_each_profile_reads_its_own_reading_line(profile_name, line, charge_nC):
    profile = load_profile(profile_name)
    sample = parse_reading(profile.reading, line, 12.5, profile.framing.encoding)
    assert sample.charge_nC == pytest.approx(charge_nC, rel=1e-12)
    assert sample.t_s == 12.5
    assert sample.raw == line.decode()


def test_identity_lines_give_their_four_fields():
    profile = load_profile("query-engineering")
    identity = parse_identity(
        profile.identity, b"chargebook-sim,QUERY-ENGINEERING,SIM-EM-0001,0.1.0"
    )
    assert (identity.manufacturer, identity.model, identity.serial, identity.firmware) == (
        "chargebook-sim",
        "QUERY-ENGINEERING",
        "SIM-EM-0001",
        "0.1.0",
    )
    with pytest.raises(ProtocolError):
        parse_identity(profile.identity, b"only,three,fields")


def _parse_or_reject(profile_name: str, raw: bytes) -> Sample | ProtocolError:
    profile = LOADED[profile_name]
    try:
        return parse_reading(profile.reading, raw, 0.0, profile.framing.encoding)
    except ProtocolError as error:
        return error


@pytest.mark.parametrize("profile_name", PROFILES)
@settings(max_examples=200, deadline=None)
@given(raw=st.binary(max_size=300))
def test_any_bytes_become_a_sample_or_a_protocol_error(profile_name, raw):
    outcome = _parse_or_reject(profile_name, raw)
    if isinstance(outcome, Sample):
        assert math.isfinite(outcome.charge_nC)
    else:
        assert outcome.line == raw


#: Lines that look almost right: a real reading with characters inserted, replaced or cut.
_ALMOST = {
    "query-plain": "Q +20.1234 nC A",
    "push-exponent": "S t=0.100 q=+1.000000E-09 C OK",
    "query-engineering": "+20.1234nC,0",
    "scpi-generic": "+2.012345E-08",
}


@pytest.mark.parametrize("profile_name", PROFILES)
@settings(max_examples=200, deadline=None)
@given(data=st.data())
def test_mutated_readings_become_a_sample_or_a_protocol_error(profile_name, data):
    line = _ALMOST[profile_name]
    start = data.draw(st.integers(0, len(line)))
    end = data.draw(st.integers(start, len(line)))
    insert = data.draw(st.text(alphabet="0123456789+-.eEnNaIifpu CQ,", max_size=6))
    raw = (line[:start] + insert + line[end:]).encode()
    outcome = _parse_or_reject(profile_name, raw)
    assert isinstance(outcome, Sample | ProtocolError)
    if isinstance(outcome, Sample):
        assert math.isfinite(outcome.charge_nC)


@pytest.mark.parametrize("profile_name", PROFILES)
@settings(max_examples=100, deadline=None)
@given(chunks=st.lists(st.binary(max_size=200), max_size=6))
def test_any_byte_stream_through_the_driver_gives_samples_errors_or_silence(profile_name, chunks):
    profile = LOADED[profile_name]
    transport = ScriptedTransport(profile.framing, [(None, chunk) for chunk in chunks])
    driver = ProfileElectrometer(profile, transport)
    driver.open()
    outcomes = []
    for _ in range(40):
        try:
            sample = driver.next_sample(0.0)
        except ProtocolError as error:
            outcomes.append(error)
            continue
        if sample is None:
            break
        assert math.isfinite(sample.charge_nC)
        outcomes.append(sample)
    else:
        pytest.fail("the driver kept producing outcomes from a finite stream")
    driver.close()
