"""End-of-beam detection, pushed and manual capture, on sample streams shaped like a beam.

The shape of a beam delivery (charge rising linearly while the beam is on, then flat but for a
tiny leakage) and the thresholds are common practice for an integrating electrometer.
"""

from __future__ import annotations

import pytest
from chargebook.acquire.engine.capture import CaptureKind, CaptureSettings, ReadingCapture
from chargebook.acquire.protocol import ReadingPhase

SETTINGS = CaptureSettings(rise_threshold_nC=0.05, flat_tolerance_pct=0.02, hold_s=1.0)


def beam_stream(total_nC: float, beam_s: float, after_s: float, dt_s: float = 0.1):
    """Yield (t_s, charge_nC): flat 0.5 s, a linear rise over beam_s, then flat for after_s."""
    t = 0.0
    while t < 0.5:
        yield t, 0.0
        t += dt_s
    start = t
    while t < start + beam_s:
        yield t, total_nC * (t - start) / beam_s
        t += dt_s
    end = t
    while t < end + after_s:
        yield t, total_nC + 1e-5 * (t - end)  # leakage ~1e-5 nC/s, common practice magnitude
        t += dt_s


def run(capture: ReadingCapture, stream):
    for t_s, charge in stream:
        result = capture.feed(t_s, charge)
        if result is not None:
            return result
    return None


def test_end_of_beam_is_declared_after_the_hold_time_with_the_final_charge():
    capture = ReadingCapture(SETTINGS, armed_t_s=0.0)
    result = run(capture, beam_stream(20.0, beam_s=2.0, after_s=3.0))
    assert result is not None
    assert result.capture is CaptureKind.AUTO
    assert result.charge_nC == pytest.approx(20.0, rel=1e-5)
    # The beam ended near t = 2.5 s; the hold time of 1 s must have passed, not much more.
    assert 3.4 <= result.t_s <= 3.8


def test_no_capture_while_the_beam_is_still_rising_or_before_it_starts():
    capture = ReadingCapture(SETTINGS, armed_t_s=0.0)
    for t_s, charge in beam_stream(20.0, beam_s=5.0, after_s=0.0):
        assert capture.feed(t_s, charge) is None
    assert capture.phase in (ReadingPhase.RISING, ReadingPhase.HOLDING)
    quiet = ReadingCapture(SETTINGS, armed_t_s=0.0)
    for step in range(100):
        assert quiet.feed(step * 0.1, 0.001) is None  # below the rise threshold: no beam
    assert quiet.phase is ReadingPhase.ARMED


def test_a_pause_in_the_beam_shorter_than_the_hold_time_does_not_end_the_reading():
    capture = ReadingCapture(SETTINGS, armed_t_s=0.0)
    samples = [(0.1 * i, 1.0 * i) for i in range(1, 11)]  # rising to 10 nC
    samples += [(1.0 + 0.1 * i, 10.0) for i in range(1, 6)]  # flat 0.5 s (< hold)
    samples += [(1.5 + 0.1 * i, 10.0 + i) for i in range(1, 11)]  # beam again, to 20 nC
    assert all(capture.feed(t, q) is None for t, q in samples)
    result = run(capture, [(2.5 + 0.1 * i, 20.0) for i in range(1, 20)])
    assert result is not None and result.charge_nC == 20.0


def test_tick_ends_the_reading_without_new_samples():
    capture = ReadingCapture(SETTINGS, armed_t_s=0.0)
    for t_s, charge in [(0.1, 0.0), (0.2, 5.0), (0.3, 10.0), (0.4, 10.0)]:
        assert capture.feed(t_s, charge) is None
    assert capture.tick(1.0) is None
    result = capture.tick(1.4)
    assert result is not None and result.charge_nC == 10.0 and result.integration_s == 1.4


def test_pushed_complete_reading_is_captured_at_once():
    capture = ReadingCapture(SETTINGS, armed_t_s=10.0)
    result = capture.feed(12.0, -19.87, complete=True)
    assert result is not None
    assert result.capture is CaptureKind.PUSHED and result.charge_nC == -19.87
    assert result.integration_s == 2.0


def test_manual_capture_takes_the_charge_so_far_and_needs_a_sample():
    capture = ReadingCapture(SETTINGS, armed_t_s=0.0)
    assert capture.capture_now(1.0) is None
    capture.feed(0.5, 7.5)
    result = capture.capture_now(1.0)
    assert result is not None and result.capture is CaptureKind.MANUAL and result.charge_nC == 7.5


def test_timed_integration_for_leakage_ends_after_its_duration():
    capture = ReadingCapture(SETTINGS, armed_t_s=0.0, timed_s=60.0)
    assert capture.phase is ReadingPhase.TIMED
    assert capture.feed(30.0, 0.0003) is None
    assert capture.tick(59.9) is None
    result = capture.feed(60.0, 0.0006)
    assert result is not None and result.charge_nC == 0.0006 and result.capture is CaptureKind.AUTO


@pytest.mark.parametrize("name", ["rise_threshold_nC", "flat_tolerance_pct", "hold_s"])
def test_settings_refuse_zero_or_negative_thresholds_naming_the_field(name):
    with pytest.raises(ValueError, match=name):
        CaptureSettings(**{name: 0.0})


def test_a_zeroed_integrator_sees_a_beam_already_under_way_at_the_first_sample():
    # Without a known baseline the first sample (mid-beam) would be taken as the start.
    capture = ReadingCapture(SETTINGS, armed_t_s=0.0, baseline_nC=0.0)
    assert capture.feed(0.1, 12.0) is None
    assert capture.phase is ReadingPhase.RISING
    result = run(capture, [(0.1 + 0.1 * i, 20.0) for i in range(1, 20)])
    assert result is not None and result.charge_nC == 20.0
