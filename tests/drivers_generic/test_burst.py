"""A burst of pushed lines read in one call gives exactly what reading them one by one gives.

The per-line parser (:meth:`ProfileElectrometer.next_sample`, tested against each profile's
manual in test_driver.py and test_lines.py) is the reference: the burst reader
(:meth:`ProfileElectrometer.read_samples`) must give the same samples (time, charge, status,
completeness, text, bit for bit), refuse the same lines in the same words, raise the same
refusals, and record the same raw traffic, for streams of good lines and for streams mixed with
everything the per-line parser refuses or skips. Charges: 1 C = 1e9 nC (SI).
"""

from __future__ import annotations

import pytest
from chargebook.drivers_generic import ProfileElectrometer, load_profile
from chargebook.drivers_generic.interface import (
    InstrumentReportedError,
    ProtocolError,
    ReadingStatus,
    SampleBurst,
    TrafficListeners,
)
from chargebook.drivers_generic.transport import ScriptedTransport
from hypothesis import given, settings
from hypothesis import strategies as st

PROFILES = ["push-exponent", "query-plain", "query-engineering", "scpi-generic"]
LOADED = {name: load_profile(name) for name in PROFILES}

#: Lines each profile's instrument may push, good and bad (as bytes, terminator added later).
_GOOD = {
    "push-exponent": [
        "S t=0.100 q=+1.000000E-09 C OK",
        "S t=0.200 q=-2.012345E-08 C OVER",
        "E t=0.300 q=+2.012345E-08 C BUSY",
    ],
    "query-plain": ["+20.1234 nC O", "-0.5000 nC O"],
    "query-engineering": ["+20.1234n,0", "-512.3p,0"],
    "scpi-generic": ["+2.012345E-08", "9.9E37", "-1.5E-09"],
}
_BAD = [
    "garbage",
    "ACK GO",
    "NAK 11",
    "S t=0.100 q=+1.0E-09 C OK",
    "S t=0.100 q=+1.000000E-09 C WHAT",
    "S t=0.100 q=nan C OK",
    "S t=0.100 q=+1.000000E-09 C OK\r",
    "+1e999",
    "",
    "x" * 300,
]


class Recorder:
    """Keeps what the transport records: (direction, t_s, raw), one entry a line."""

    def __init__(self) -> None:
        self.lines: list[tuple[str, float, bytes]] = []
        self.bursts = 0

    def one(self, direction, t_s, raw) -> None:
        self.lines.append((direction.value, t_s, bytes(raw)))

    def burst(self, direction, t_s, lines) -> None:
        self.bursts += 1
        self.lines.extend((direction.value, t_s, bytes(raw)) for raw in lines)


def _driver(profile_name: str, chunks: list[bytes], recorder: Recorder, *, bursts: bool):
    profile = LOADED[profile_name]
    traffic = TrafficListeners(recorder.one, recorder.burst) if bursts else recorder.one
    pairs = [(None, chunk) for chunk in chunks]
    transport = ScriptedTransport(profile.framing, pairs, traffic=traffic, clock=lambda: 7.25)
    driver = ProfileElectrometer(profile, transport)
    driver.open()
    return driver


def one_by_one(profile_name: str, chunks: list[bytes]):
    """Return (samples, rejected messages, refusals, traffic) read with next_sample."""
    return _read_all(profile_name, chunks, bursts=False)


def by_bursts(profile_name: str, chunks: list[bytes]):
    """Return (samples, rejected messages, refusals, traffic) read with read_samples."""
    return _read_all(profile_name, chunks, bursts=True)


def _read_all(profile_name: str, chunks: list[bytes], *, bursts: bool):
    recorder = Recorder()
    driver = _driver(profile_name, chunks, recorder, bursts=bursts)
    samples, rejected, refused = [], [], []
    for _ in range(10_000):
        try:
            read = driver.read_samples(0.0) if bursts else _one_line(driver)
        except ProtocolError as error:  # one line at a time only: a burst returns them
            rejected.append((str(error), error.line))
            continue
        except InstrumentReportedError as error:
            refused.append(str(error))
            continue
        if not read.count:
            break
        assert read.lines is None or len(read.lines) == len(read.samples)
        samples.extend(read.samples)
        rejected.extend((str(error), error.line) for error in read.rejected)
    driver.close()
    return samples, rejected, refused, recorder.lines


def _one_line(driver: ProfileElectrometer) -> SampleBurst:
    """Return next_sample's answer in the shape of a burst."""
    sample = driver.next_sample(0.0)
    return SampleBurst([] if sample is None else [sample], None, [], int(sample is not None))


def _stream(profile_name: str, lines: list[str]) -> bytes:
    terminator = LOADED[profile_name].framing.read_terminator
    return b"".join(line.encode() + terminator for line in lines)


def test_a_clean_stream_is_read_as_one_burst_with_the_charges_in_nC():
    profile = "push-exponent"
    lines = [f"S t={n / 1000:.3f} q=+{1 + n / 1000:.6f}E-09 C OK" for n in range(500)]
    lines.append("E t=0.500 q=+2.012345E-08 C OK")
    recorder = Recorder()
    driver = _driver(profile, [_stream(profile, lines)], recorder, bursts=True)
    burst = driver.read_samples(0.0)
    assert burst.count == 501 and burst.lines is None and burst.rejected == []
    assert recorder.bursts == 1 and len(recorder.lines) == 501
    # 1.001000E-09 C = 1.001 nC; 2.012345E-08 C = 20.12345 nC (SI prefixes)
    assert burst.samples[1].charge_nC == pytest.approx(1.001, rel=1e-15)
    assert burst.samples[-1].charge_nC == pytest.approx(20.12345, rel=1e-15)
    assert [s.complete for s in burst.samples].count(True) == 1
    assert {s.status for s in burst.samples} == {ReadingStatus.OK}
    assert burst.samples == one_by_one(profile, [_stream(profile, lines)])[0]
    driver.close()


@pytest.mark.parametrize("profile_name", PROFILES)
@settings(max_examples=150, deadline=None)
@given(data=st.data())
def test_bursts_give_what_one_line_at_a_time_gives(profile_name, data):
    choices = _GOOD[profile_name] + _BAD
    lines = data.draw(st.lists(st.sampled_from(choices), max_size=30))
    stream = _stream(profile_name, lines)
    cuts = sorted(data.draw(st.lists(st.integers(0, len(stream)), max_size=4)))
    chunks = [stream[a:b] for a, b in zip([0, *cuts], [*cuts, len(stream)], strict=True)]
    assert by_bursts(profile_name, chunks) == one_by_one(profile_name, chunks)


@pytest.mark.parametrize("profile_name", PROFILES)
@settings(max_examples=60, deadline=None)
@given(chunks=st.lists(st.binary(max_size=200), max_size=6))
def test_any_bytes_give_the_same_in_bursts_as_line_by_line(profile_name, chunks):
    assert by_bursts(profile_name, chunks) == one_by_one(profile_name, chunks)
