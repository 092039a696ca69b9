"""Leakage scaled to a reading's integration time: charge = current × time (common practice:
a steady leakage current, so the charge grows in proportion to the time it is collected over)."""

from __future__ import annotations

import math

import pytest
from chargebook.corrections.errors import InputError
from chargebook.corrections.leakage import leakage_per_reading_nC


def test_leakage_scales_with_the_ratio_of_integration_times() -> None:
    # 0.003 nC over 60 s is 50 fA; over a 12 s reading that is 0.0006 nC (Q = I t).
    assert leakage_per_reading_nC(0.003, 60.0, [12.0]) == pytest.approx(0.0006, rel=1e-12)


def test_the_reading_time_is_the_mean_of_the_readings_times() -> None:
    assert leakage_per_reading_nC(-0.002, 30.0, [10.0, 12.0, 14.0]) == pytest.approx(
        -0.002 * 12.0 / 30.0, rel=1e-12
    )


def test_a_leakage_of_exact_zero_stays_zero() -> None:
    assert leakage_per_reading_nC(0.0, 60.0, [12.0]) == 0.0


@pytest.mark.parametrize(
    ("args", "field"),
    [
        ((0.003, 0.0, [12.0]), "leakage_time_s"),
        ((0.003, -60.0, [12.0]), "leakage_time_s"),
        ((0.003, math.nan, [12.0]), "leakage_time_s"),
        ((math.inf, 60.0, [12.0]), "leakage_charge_nC"),
        ((0.003, 60.0, []), "reading_times_s"),
        ((0.003, 60.0, [12.0, -1.0]), "reading_times_s[1]"),
    ],
)
def test_bad_times_are_refused_naming_the_field(args: tuple, field: str) -> None:
    with pytest.raises(InputError) as caught:
        leakage_per_reading_nC(*args)
    assert caught.value.field == field
