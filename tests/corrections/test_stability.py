"""Flags: each limit raises its flag just past the threshold and stays quiet inside it."""

from __future__ import annotations

import dataclasses

import pytest
from chargebook.corrections.errors import InputError
from chargebook.corrections.stability import (
    Thresholds,
    charge_per_MU_flags,
    environment_flags,
    humidity_flags,
    integration_time_flags,
    k_pol_flags,
    k_s_flags,
    leakage_flags,
    set_flags,
    sign_flags,
)
from chargebook.corrections.statistics import set_statistics

LIMITS = Thresholds()
STEADY = [20.110, 20.112, 20.111, 20.113, 20.110]


def codes(flags: list) -> list[str]:
    return [flag.code for flag in flags]


def test_documented_defaults() -> None:
    # k_pol 0.4 % (TG-51 addendum, from memory); k_s 1.05 (from memory); leakage 0.1 %
    # (TG-51 addendum, from memory); modified z 3.5 (Iglewicz and Hoaglin 1993).
    assert LIMITS.k_pol_deviation_pct == 0.4
    assert LIMITS.k_s_max == 1.05
    assert LIMITS.leakage_pct == 0.1
    assert LIMITS.outlier_modified_z == 3.5


def test_steady_set_has_no_flags() -> None:
    assert set_flags("routine", set_statistics(STEADY), LIMITS) == []


def test_single_reading_is_said_not_guessed() -> None:
    flags = set_flags("opposite", set_statistics([20.1]), LIMITS)
    assert codes(flags) == ["opposite_single_reading"]
    assert "SD is undefined" in flags[0].message
    assert flags[0].severity == "info"


def test_scatter_flag_says_how_much_and_the_limit() -> None:
    flags = set_flags("routine", set_statistics([20.0, 20.1, 19.95, 20.08, 19.97]), LIMITS)
    assert "routine_sd_high" in codes(flags)
    message = next(f.message for f in flags if f.code == "routine_sd_high")
    assert "0.2 % limit" in message


def test_drift_flag() -> None:
    drifting = [20.00, 20.02, 20.04, 20.06, 20.08]  # +0.1 % per reading
    assert "reduced_drift" in codes(set_flags("reduced", set_statistics(drifting), LIMITS))


def test_settling_flag_for_a_first_reading_apart() -> None:
    readings = [20.20, 20.11, 20.11, 20.112, 20.109]
    assert "opposite_not_settled" in codes(set_flags("opposite", set_statistics(readings), LIMITS))


def test_outlier_flag_names_the_reading_number() -> None:
    readings = [20.11, 20.112, 20.111, 20.30, 20.11]
    flags = set_flags("routine", set_statistics(readings), LIMITS)
    message = next(f.message for f in flags if f.code == "routine_outlier")
    assert "reading(s) 4 " in message


def test_minimum_readings_decides_when_trends_are_judged() -> None:
    drifting = [20.00, 20.02, 20.04, 20.06]  # +0.1 % per reading: a drift with four readings
    flags = set_flags("routine", set_statistics(drifting), LIMITS)
    assert "routine_drift" in codes(flags)
    # With 5 readings asked for, four are too few: said once, and no drift judged from them.
    asking_five = dataclasses.replace(LIMITS, minimum_readings=5)
    flags = set_flags("routine", set_statistics(drifting), asking_five)
    assert codes(flags) == ["routine_few_readings"]
    assert "at least 5 are needed" in flags[0].message
    # Asking for 2 cannot judge a trend from two readings (a line through two points):
    # the set is still said to be too small for that.
    asking_two = dataclasses.replace(LIMITS, minimum_readings=2)
    flags = set_flags("routine", set_statistics([20.00, 20.02]), asking_two)
    assert codes(flags) == ["routine_few_readings"]
    assert "at least 3 are needed" in flags[0].message


def test_thresholds_are_settings() -> None:
    strict = dataclasses.replace(LIMITS, relative_sd_pct=0.001)
    assert "routine_sd_high" in codes(set_flags("routine", set_statistics(STEADY), strict))


@pytest.mark.parametrize(
    ("k_pol", "flagged"), [(1.0039, False), (0.9961, False), (1.0041, True), (0.9959, True)]
)
def test_k_pol_limit(k_pol: float, flagged: bool) -> None:
    assert bool(k_pol_flags(k_pol, "k_pol", LIMITS)) is flagged


@pytest.mark.parametrize(("k_s", "flagged"), [(1.05, False), (1.0501, True)])
def test_k_s_limit(k_s: float, flagged: bool) -> None:
    flags = k_s_flags(k_s, "P_ion", LIMITS)
    assert bool(flags) is flagged
    if flagged:
        assert flags[0].message.startswith("P_ion = 1.0501")


@pytest.mark.parametrize(("leakage", "flagged"), [(0.02, False), (-0.021, True)])
def test_leakage_limit(leakage: float, flagged: bool) -> None:
    # 0.1 % of 20 nC is 0.02 nC.
    assert bool(leakage_flags(leakage, 20.0, LIMITS)) is flagged


def test_changing_environment() -> None:
    flags = environment_flags([20.0, 20.3, 20.7], [101.0, 101.1], LIMITS)
    assert codes(flags) == ["temperature_changing"]
    flags = environment_flags([20.0], [101.0, 101.3], LIMITS)
    assert codes(flags) == ["pressure_changing"]


def test_humidity_flags() -> None:
    assert codes(humidity_flags(None)) == ["k_h_assumed"]
    assert humidity_flags(50.0) == []
    assert codes(humidity_flags(90.0)) == ["humidity_out_of_band"]


def test_sign_against_bias_only_when_the_convention_is_known() -> None:
    assert sign_flags(300.0, -20.0, LIMITS) == []
    known = dataclasses.replace(LIMITS, charge_sign_for_positive_bias=1)
    assert codes(sign_flags(300.0, -20.0, known)) == ["sign_against_bias"]
    assert sign_flags(-300.0, -20.0, known) == []


@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"relative_sd_pct": -0.1}, "thresholds.relative_sd_pct"),
        # NaN compares false with every value, so a NaN limit would never flag: refused, as
        # is an infinite one (a worksheet's TOML or JSON can spell both).
        ({"relative_sd_pct": float("nan")}, "thresholds.relative_sd_pct"),
        ({"leakage_pct": float("inf")}, "thresholds.leakage_pct"),
        ({"k_s_max": float("nan")}, "thresholds.k_s_max"),
        ({"charge_sign_for_positive_bias": True}, "thresholds.charge_sign_for_positive_bias"),
        ({"k_s_max": 0.99}, "thresholds.k_s_max"),
        ({"minimum_readings": 0}, "thresholds.minimum_readings"),
        ({"charge_sign_for_positive_bias": 2}, "thresholds.charge_sign_for_positive_bias"),
    ],
)
def test_bad_thresholds_are_refused(change: dict, field: str) -> None:
    with pytest.raises(InputError) as caught:
        Thresholds(**change)
    assert caught.value.field == field


# k_s below 1 (issue 12 item 1). Check values: TRS-398 (2000) pulsed quadratic, n = 3.0 row
# a0 = 1.198, a1 = -0.875, a2 = 0.677 (from memory): at M1/M2 = 0.99, by hand,
# 1.198 - 0.86625 + 0.663527 = 0.995277; at 1.000, 1.000; at 1.01, 1.004631.
# AAPM TG-51 (1999) linear form P_ion = (1 - n)/(M1/M2 - n), n = 3: at 0.99, 2/2.01 = 0.995025.
@pytest.mark.parametrize(
    ("k_s", "ratio", "flagged"),
    [
        (0.995277, 0.99, True),  # TRS-398 pulsed, n = 3
        (2.0 / 2.01, 0.99, True),  # TG-51 linear, n = 3
        (1.000, 1.000, False),  # complete collection, within the table's rounding
        (1.004631, 1.01, False),  # normal recombination
        (8.0 / 8.01, 0.99, True),  # continuous (n² − 1)/(n² − M1/M2), n = 3: ratio catches it
    ],
)
def test_k_s_below_one_is_flagged(k_s: float, ratio: float, flagged: bool) -> None:
    flags = [f for f in k_s_flags(k_s, "k_s", LIMITS, charge_ratio=ratio)]
    assert ("k_s_below_one" in codes(flags)) is flagged
    if flagged:
        flag = next(f for f in flags if f.code == "k_s_below_one")
        assert flag.severity == "error"
        for words in ("swapped", "settled", "bias set on the electrometer"):
            assert words in flag.message


def test_a_set_of_identical_readings_is_flagged_as_a_possibly_frozen_electrometer() -> None:
    # Repeat readings of a reference-class chamber differ by about 0.1 % (common practice):
    # three or more exactly equal readings point to a frozen or held display, not to stability.
    flags = set_flags("routine", set_statistics([19.6000] * 4), LIMITS)
    assert codes(flags) == ["routine_identical"]
    assert "frozen" in flags[0].message and "4 routine" in flags[0].message
    assert "routine_identical" not in codes(
        set_flags("routine", set_statistics([19.6000, 19.6000]), LIMITS)
    )  # two equal readings at the display's resolution happen
    assert set_flags("routine", set_statistics([19.6000, 19.6000, 19.6001]), LIMITS) == []


def test_an_integration_shorter_than_any_delivery_of_its_mu_is_flagged() -> None:
    # 100 MU at the highest clinical dose rate, about 2400 MU/min (FFF beams, from memory),
    # take 2.5 s: a 0.2 s integration cannot hold them; 10 s (600 MU/min) can.
    flags = integration_time_flags("routine", "routine", [10.0, 0.2, 9.8], 100.0)
    assert codes(flags) == ["routine_integration_too_short"]
    assert "0.2 s" in flags[0].message and "2.5 s" in flags[0].message
    assert integration_time_flags("routine", "routine", [10.0, 2.6], 100.0) == []
    assert integration_time_flags("leakage", "leakage", [0.1], 0.0) == []


def test_a_charge_per_mu_far_from_the_routine_sets_is_flagged() -> None:
    # Polarity moves the charge by tenths of a percent and recombination at half the bias by a
    # few percent (TRS-398 k_pol, k_s; common practice): 0.196 vs 0.1960 nC/MU is fine, half is not
    assert charge_per_MU_flags("reduced-bias", "reduced", 0.191, "routine", 0.196) == []
    flags = charge_per_MU_flags("opposite-polarity", "opposite", -0.098, "routine", 0.196)
    assert codes(flags) == ["opposite_charge_per_MU"]
    assert "-50.0 %" in flags[0].message and "MU delivered" in flags[0].message
