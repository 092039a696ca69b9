"""The console's wording of numbers, flags and states: never "0" or "1" for a missing value,
never colour alone for a flag."""

from __future__ import annotations

from chargebook.tui import text


def test_a_missing_value_reads_pending_never_zero_or_one():
    assert text.number(None, 4) == "pending"
    assert text.charge_nC(None) == "pending"
    assert text.deviation_pct(None) == "pending"


def test_negative_numbers_use_a_true_minus_sign_and_deviations_carry_their_sign():
    # A number and its unit are joined by a no-break space (U+00A0): never split over lines.
    assert text.charge_nC(-18.5625) == "\u221218.5625\u00a0nC"
    assert text.deviation_pct(0.4213) == "+0.42\u00a0%"
    assert text.deviation_pct(-1.1) == "\u22121.10\u00a0%"
    assert text.bias_V(-300.0) == "\u2212300\u00a0V"
    assert text.bias_V(300.0) == "+300\u00a0V"


def test_every_flag_carries_a_text_marker_by_severity():
    warning = {"code": "sd_high", "message": "scatter above the limit", "severity": "warning"}
    error = {"code": "k_s_high", "message": "k_s above 1.05", "severity": "error"}
    info = {"code": "settling", "message": "kept, not used", "severity": "info"}
    assert text.flag(warning) == "! scatter above the limit"
    assert text.flag(error) == "!! k_s above 1.05"
    assert text.flag(info) == "i kept, not used"
    assert text.flags_or_ok([]) == ["ok no flags"]


def test_a_reading_marker_shows_the_worst_flag_or_settling():
    warning = {"severity": "warning"}
    error = {"severity": "error"}
    assert text.reading_marker([warning, error], settling=False) == "!!"
    assert text.reading_marker([warning], settling=False) == "!"
    assert text.reading_marker([], settling=False) == "ok"
    assert text.reading_marker([warning], settling=True) == "settling"


def test_states_steps_and_conventions_are_said_in_plain_words():
    assert text.state("waiting_for_operator") == "waiting for you"
    assert text.purpose("opposite") == "Opposite polarity"
    assert text.convention("tg51") == "AAPM TG-51"
    assert text.set_status("superseded") == "superseded"


def test_stored_utc_times_are_shown_in_local_time_with_their_offset(monkeypatch) -> None:
    import time

    monkeypatch.setenv("TZ", "CET-1")  # a POSIX zone one hour east of UTC, no tz database
    time.tzset()
    try:
        assert text.local_time("2026-12-02T06:38:17.273976+00:00") == "2026-12-02 07:38:17 +01:00"
        assert text.local_time("not a time") == "not a time"
        assert text.local_time(None) == ""
    finally:
        monkeypatch.undo()
        time.tzset()


def test_two_readings_0_05_pct_apart_are_drawn_on_the_stated_scale_not_full_and_empty() -> None:
    # Readings 0.05 % apart around their mean: 0.05/0.2 of the 8-level scale, one or two steps.
    mean = 20.0
    low, high = mean * (1 - 0.00025), mean * (1 + 0.00025)
    bars = text.deviation_bars([low, high], mean).split()
    levels = "▁▂▃▄▅▆▇█"
    assert levels.index(bars[1]) - levels.index(bars[0]) in (1, 2)  # not an empty and a full bar
    assert bars[0] not in ("▁", "▼") and bars[1] not in ("█", "▲")
    # Beyond ±0.1 % of the mean: marked, never clipped silently to a full or empty bar.
    assert text.deviation_bars([mean * 1.002, mean * 0.998], mean) == "▲ ▼"
    # Negative charges (negative bias): a larger magnitude draws a higher bar.
    assert text.deviation_bars([-mean * 1.0005], -mean) == "▆"  # +0.05 %: 5.25 of 7 steps
    assert "+0.1 % of the mean" in text.bar_scale_caption()
    assert text.deviation_bars([1.0], None) == ""
