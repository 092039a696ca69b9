"""Reading-set statistics against Python's own statistics module and the published formulas."""

from __future__ import annotations

import statistics as reference

import numpy as np
import pytest
from chargebook.corrections.errors import InputError
from chargebook.corrections.statistics import (
    drift_pct_per_reading,
    median,
    modified_z_scores,
    relative_sd_pct,
    set_spread,
    set_statistics,
)
from hypothesis import given, settings
from hypothesis import strategies as st

READINGS = [20.112, 20.118, 20.109, 20.115, 20.111, 20.121]


def test_mean_sd_and_standard_error_match_the_standard_library() -> None:
    # Reference library: Python's statistics module (mean, sample stdev with n − 1).
    stats = set_statistics(READINGS)
    assert stats.count == 6
    assert stats.mean_nC == pytest.approx(reference.mean(READINGS), rel=1e-15)
    assert stats.sd_nC == pytest.approx(reference.stdev(READINGS), rel=1e-12)
    assert stats.standard_error_nC == pytest.approx(reference.stdev(READINGS) / 6**0.5, rel=1e-12)
    assert stats.relative_sd_pct == pytest.approx(
        100 * reference.stdev(READINGS) / reference.mean(READINGS), rel=1e-12
    )


def test_relative_range() -> None:
    stats = set_statistics(READINGS)
    expected = 100 * (20.121 - 20.109) / reference.mean(READINGS)  # definition, by hand
    assert stats.relative_range_pct == pytest.approx(expected, rel=1e-12)


def test_drift_matches_a_least_squares_line() -> None:
    # Reference: statistics.linear_regression (ordinary least squares) of reading vs index.
    slope = reference.linear_regression(range(len(READINGS)), READINGS).slope
    expected = 100 * slope / reference.mean(READINGS)
    assert set_statistics(READINGS).drift_pct_per_reading == pytest.approx(expected, rel=1e-9)


def test_drift_sign_follows_the_magnitude_for_negative_charge() -> None:
    growing_magnitude = [-20.00, -20.02, -20.04, -20.06]
    assert drift_pct_per_reading(np.array(growing_magnitude)) > 0


def test_modified_z_scores_follow_iglewicz_and_hoaglin() -> None:
    # M_i = 0.6745 (x_i − median)/MAD (Iglewicz and Hoaglin 1993), evaluated here with the
    # standard library's median as the reference.
    values = [10.0, 10.1, 9.9, 10.05, 12.0]
    median = reference.median(values)
    mad = reference.median([abs(v - median) for v in values])
    expected = [0.6745 * (v - median) / mad for v in values]
    assert modified_z_scores(np.array(values)) == pytest.approx(expected, rel=1e-12)


def test_a_spike_is_an_outlier_and_the_rest_are_not() -> None:
    readings = [20.11, 20.12, 20.10, 20.11, 20.45, 20.12]
    assert set_statistics(readings).outliers == (4,)


def test_quantised_readings_with_zero_mad_are_not_all_outliers() -> None:
    # MAD = 0 (most readings identical): the scaled mean absolute deviation stands in
    # (common practice), so a one-digit step is not an outlier but a real spike is.
    assert set_statistics([20.01, 20.01, 20.01, 20.02]).outliers == ()
    assert set_statistics([20.01, 20.01, 20.01, 20.01, 20.01, 20.50]).outliers == (5,)


def test_outlier_threshold_is_a_setting() -> None:
    readings = [10.0, 10.1, 9.9, 10.05, 10.25]  # z of the last = 0.6745·0.2/0.05 = 2.7
    assert set_statistics(readings).outliers == ()
    assert set_statistics(readings, outlier_threshold=2.5).outliers == (4,)


def test_first_reading_offset_shows_settling() -> None:
    stats = set_statistics([20.30, 20.10, 20.11, 20.09])
    assert stats.first_reading_offset_pct == pytest.approx(100 * (20.30 - 20.10) / 20.10, rel=1e-9)


def test_one_reading_leaves_spread_undefined() -> None:
    stats = set_statistics([20.1])
    assert stats.mean_nC == 20.1
    assert stats.sd_nC is None
    assert stats.standard_error_nC is None
    assert stats.relative_standard_error_pct is None
    assert stats.drift_pct_per_reading is None
    assert stats.outliers == ()


def test_two_readings_have_sd_but_no_trend() -> None:
    stats = set_statistics([20.1, 20.2])
    assert stats.sd_nC == pytest.approx(reference.stdev([20.1, 20.2]))
    assert stats.drift_pct_per_reading is None


def test_to_dict_is_plain() -> None:
    result = set_statistics(READINGS).to_dict()
    assert result["outliers"] == []
    assert result["count"] == 6
    assert result["relative_standard_error_pct"] > 0


@given(
    st.lists(st.floats(1.0, 100.0), min_size=2, max_size=20),
    st.floats(1e-3, 1e3),
)
def test_relative_statistics_are_scale_invariant(readings: list[float], scale: float) -> None:
    scaled = [r * scale for r in readings]
    assert relative_sd_pct(np.array(scaled)) == pytest.approx(
        relative_sd_pct(np.array(readings)), rel=1e-6, abs=1e-9
    )


def test_rows_are_processed_at_once() -> None:
    rows = np.array([READINGS, [r * 2 for r in READINGS]])
    assert relative_sd_pct(rows) == pytest.approx([relative_sd_pct(np.array(READINGS))] * 2)


@pytest.mark.parametrize(
    ("readings", "field"),
    [
        ([], "readings_nC"),
        ([20.1, "x"], "readings_nC[1]"),
        ([20.1, float("nan")], "readings_nC[1]"),
        ([20.1, 20.2, 2e9], "readings_nC[2]"),  # beyond the plausible charge range
        ([20.1, True], "readings_nC[1]"),  # a yes/no is no charge, though Python counts it 1
        (np.array([20.1, np.inf]), "readings_nC[1]"),
        ("20.1", "readings_nC"),
        ([20.0, -20.0], "readings_nC"),
    ],
)
def test_bad_sets_are_refused(readings: object, field: str) -> None:
    with pytest.raises(InputError) as caught:
        set_statistics(readings)  # type: ignore[arg-type]
    assert caught.value.field == field


def test_readings_given_as_integers_or_an_array_give_the_statistics_of_the_floats() -> None:
    as_floats = set_statistics([20.0, 21.0, 22.0, 20.0])
    assert set_statistics([20, 21, 22, 20]) == as_floats
    assert set_statistics(np.array([20, 21, 22, 20])) == as_floats
    assert set_statistics(np.array([20.0, 21.0, 22.0, 20.0], dtype=np.float32)) == as_floats


def test_a_first_reading_against_others_that_average_zero_has_no_offset() -> None:
    # 20, -20, 20 nC: the mean is finite, but the other two average zero, so the first
    # reading's offset from them (a division by their mean) does not exist. It once came out
    # infinite, which no JSON message can carry: the daemon could not send its snapshot.
    stats = set_statistics([20.0, -20.0, 20.0])
    assert stats.first_reading_offset_pct is None
    assert stats.mean_nC == pytest.approx(20.0 / 3)


@given(
    st.lists(
        st.lists(
            st.sampled_from([20.11, 20.12, -0.0, 0.0, float("nan")])
            | st.floats(-1e6, 1e6, allow_nan=False),
            min_size=5,
            max_size=5,
        ),
        min_size=1,
        max_size=4,
    ),
    st.integers(1, 5),
)
def test_the_median_is_numpys_bit_for_bit(rows: list[list[float]], count: int) -> None:
    # Reference library: numpy's own np.median, compared exactly (the same bits, the sign of a
    # zero and NaN included), row by row and for one set.
    values = np.array(rows)[:, :count]
    for keepdims in (False, True):
        expected = np.median(values, axis=-1, keepdims=keepdims)
        found = median(values, keepdims=keepdims)
        assert found.shape == expected.shape
        assert np.array_equal(found, expected, equal_nan=True)
        assert np.array_equal(np.signbit(found), np.signbit(expected))
    one, expected_one = median(values[0]), np.median(values[0])
    assert type(one) is type(expected_one)
    assert np.array_equal(one, expected_one, equal_nan=True)
    assert np.signbit(one) == np.signbit(expected_one)


def test_a_sets_spread_matches_the_standard_library_and_its_full_statistics() -> None:
    # Reference library: Python's statistics module (mean, sample stdev with n − 1); the
    # values a report shows of a set are its full statistics', bit for bit.
    spread, full = set_spread(READINGS), set_statistics(READINGS)
    assert spread.count == 6
    assert spread.mean_nC == pytest.approx(reference.mean(READINGS), rel=1e-15)
    assert spread.relative_sd_pct == pytest.approx(
        100 * reference.stdev(READINGS) / reference.mean(READINGS), rel=1e-12
    )
    assert (spread.mean_nC, spread.relative_sd_pct) == (full.mean_nC, full.relative_sd_pct)


@settings(max_examples=200)
@given(st.lists(st.floats(min_value=-1e3, max_value=1e3), min_size=1, max_size=20))
def test_a_sets_spread_is_its_full_statistics_bit_for_bit(readings: list[float]) -> None:
    try:
        full = set_statistics(readings)
    except InputError:  # averages zero: refused alike
        with pytest.raises(InputError, match="averages zero"):
            set_spread(readings)
        return
    spread = set_spread(readings)
    assert (spread.count, spread.mean_nC, spread.relative_sd_pct) == (
        full.count,
        full.mean_nC,
        full.relative_sd_pct,
    )


@pytest.mark.parametrize("readings", [[], [float("nan")], "12.1", [1e30]])
def test_a_bad_set_has_no_spread(readings: object) -> None:
    with pytest.raises(InputError, match="readings_nC"):
        set_spread(readings)  # type: ignore[arg-type]
