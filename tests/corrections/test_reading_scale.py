"""Readings as a report plots them: deviation in % of the mean, and the recorded resolution."""

from __future__ import annotations

import statistics

import pytest
from chargebook.corrections.reading_scale import (
    deviations_from_mean_pct,
    recorded_resolution_nC,
    resolution_pct,
)


def test_deviations_are_in_percent_of_the_mean() -> None:
    charges = [14.762, 14.758, 14.765]  # invented, demo-like
    mean = statistics.fmean(charges)  # the standard library's mean, an independent oracle
    expected = [100 * (q - mean) / mean for q in charges]
    assert deviations_from_mean_pct(charges, mean) == pytest.approx(expected, abs=1e-12)
    # A negative polarity set: a reading larger in magnitude lies above its mean.
    assert deviations_from_mean_pct([-14.80], -14.70)[0] == pytest.approx(100 * 0.1 / 14.7)


def test_a_zero_mean_is_refused_by_name() -> None:
    with pytest.raises(ValueError, match="mean_nC is 0"):
        deviations_from_mean_pct([0.1], 0.0)


@pytest.mark.parametrize(
    ("charges", "resolution"),
    [
        ([14.762, 14.758], 0.001),
        ([14.76, 14.7], 0.01),
        ([-0.0021, 0.0004], 0.0001),
        ([15.0, 14.0], 1.0),
        ([], None),
        ([14.7620001234567], None),  # computed, not read: finer than 1 fC
    ],
)
def test_the_recorded_resolution_is_the_coarsest_step_every_charge_is_a_multiple_of(
    charges: list[float], resolution: float | None
) -> None:
    assert recorded_resolution_nC(charges) == resolution


def test_a_resolution_as_a_share_of_the_mean() -> None:
    # 0.001 nC on a 14.75 nC mean: 0.00678 % (arithmetic).
    assert resolution_pct(0.001, -14.75) == pytest.approx(0.006779661, rel=1e-6)
