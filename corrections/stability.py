"""Flags: findings about readings and factors, each in plain words with what to do about it.

Pure functions turn reading-set statistics, factors and the environment into :class:`Flag`s. Every
limit is a field of :class:`Thresholds`, whose defaults are documented beside each field with
where they come from (docs/physics.md). A flag never stops the calculation: a physicist may
knowingly accept what it reports.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from chargebook.corrections.errors import Flag, InputError
from chargebook.corrections.humidity import BAND_HIGH_PCT, BAND_LOW_PCT, humidity_in_band
from chargebook.corrections.statistics import (
    MINIMUM_FOR_TRENDS,
    MODIFIED_Z_THRESHOLD,
    SetStatistics,
)

#: Plain names of the three reading sets, for messages.
SET_NAMES = {
    "routine": "routine",
    "opposite": "opposite-polarity",
    "reduced": "reduced-bias",
    "return": "return-check",
}


#: What to do with a voltage ratio off the TRS-398 (2000) table.
RECOMBINATION_OFF_TABLE = ("refuse", "boag")


def _finite_number(value: object) -> bool:
    """Return True for an int or float (not a bool) that is finite."""
    return (
        isinstance(value, int | float) and not isinstance(value, bool) and bool(np.isfinite(value))
    )


@dataclass(frozen=True)
class Thresholds:
    """Limits beyond which a flag is raised; all are settings, with these defaults."""

    #: Relative SD of a set, %. Repeat readings agree to about 0.1 % (common practice).
    relative_sd_pct: float = 0.2
    #: (max − min) of a set in % of its mean (common practice).
    relative_range_pct: float = 0.5
    #: |drift slope| of a set in % of the mean per reading (common practice).
    drift_pct_per_reading: float = 0.05
    #: |modified z-score| above which a reading is an outlier (Iglewicz and Hoaglin 1993).
    outlier_modified_z: float = MODIFIED_Z_THRESHOLD
    #: |first reading − mean of the rest| in % that suggests the chamber had not settled
    #: after a polarity or bias change (common practice).
    settling_pct: float = 0.2
    #: Fewest readings per set for drift, settling and outliers to be judged (common practice;
    #: never fewer than the three a trend needs, statistics.MINIMUM_FOR_TRENDS).
    minimum_readings: int = 3
    #: |k_pol − 1| in %, usual for reference-class chambers (TG-51 addendum, from memory).
    k_pol_deviation_pct: float = 0.4
    #: Largest usual k_s: above, the chamber is unsuitable for the beam (from memory).
    k_s_max: float = 1.05
    #: Smallest k_s (TG-51: P_ion) accepted without a flag. Below 1 it is physically impossible
    #: (a collection efficiency above 1). The tolerance covers the TRS-398 (2000) table's rounding
    #: near saturation: its coefficients have 3 decimals, so a row gives 1 at M1/M2 = 1 only to
    #: about ±0.001 (from memory); 0.999 keeps M1/M2 = 1 unflagged whatever the row.
    k_s_min: float = 0.999
    #: Smallest charge ratio M1/M2 (routine over reduced-bias mean) accepted without a flag.
    #: Below 1 the reduced-bias reading is the larger one, which complete or incomplete
    #: collection cannot give; 0.999 leaves room for the scatter of two set means of repeat
    #: readings agreeing to about 0.1 % (common practice). It catches continuous beams, whose
    #: k_s moves only slightly with M1/M2 (n = 3, M1/M2 = 0.99 gives k_s = 0.9988).
    charge_ratio_min: float = 0.999
    #: |leakage| in % of the routine reading (TG-51 addendum, from memory).
    leakage_pct: float = 0.1
    #: Largest change of temperature during a session, °C (common practice).
    temperature_change_C: float = 0.5
    #: Largest change of pressure during a session, kPa (common practice).
    pressure_change_kPa: float = 0.2
    #: Sign of the charge this electrometer shows for a positive bias (+1 or −1); None: the
    #: convention is not known and only the consistency between sets is checked.
    charge_sign_for_positive_bias: int | None = None
    #: Oldest carried k_pol or k_s, in days, accepted without a flag: a full calibration a
    #: year old (common practice; the AAPM TG-142 annual calibration, from memory).
    carried_max_age_days: float = 365.0
    #: A calibration certificate in the station's registers older than this, in years, is
    #: flagged at session start (common practice: two years).
    certificate_validity_years: float = 2.0
    #: A reading within this % of its set's median is never an outlier, however small the MAD:
    #: four readings 0.03 % apart are a good set, not one with an outlier (common practice).
    outlier_floor_pct: float = 0.05
    #: The smallest bias step of the electrometer, V; None: biases known to 0.001 in n. Sets how
    #: closely n = V1/V2 must equal a TRS-398 (2000) table row for that row to be used.
    bias_resolution_V: float | None = None
    #: A voltage ratio off the TRS-398 (2000) table: "refuse" (default) or "boag" (k_s by
    #: Boag's theory for pulsed beams, flagged with the method).
    recombination_off_table: str = "refuse"
    #: |return-check mean / routine mean − 1| in % above which the beam or chamber is taken to
    #: have moved between the first and last sets (common practice).
    return_check_pct: float = 0.2

    def __post_init__(self) -> None:
        for name in (
            "relative_sd_pct",
            "relative_range_pct",
            "drift_pct_per_reading",
            "outlier_modified_z",
            "settling_pct",
            "k_pol_deviation_pct",
            "leakage_pct",
            "temperature_change_C",
            "pressure_change_kPa",
            "carried_max_age_days",
            "certificate_validity_years",
            "outlier_floor_pct",
            "return_check_pct",
        ):
            value = getattr(self, name)
            # NaN compares false with everything: a NaN limit would silently never flag.
            if not _finite_number(value) or value <= 0:
                raise InputError(f"thresholds.{name}", value, "a finite number above 0")
        if not _finite_number(self.k_s_max) or not 1.0 < self.k_s_max <= 2.0:
            raise InputError("thresholds.k_s_max", self.k_s_max, "above 1 and at most 2")
        for name in ("k_s_min", "charge_ratio_min"):
            value = getattr(self, name)
            if not _finite_number(value) or not 0.9 <= value <= 1.0:
                raise InputError(f"thresholds.{name}", value, "from 0.9 to 1")
        resolution = self.bias_resolution_V
        if resolution is not None and (not _finite_number(resolution) or not 0 < resolution <= 10):
            raise InputError("thresholds.bias_resolution_V", resolution, "above 0 to 10 V")
        if self.recombination_off_table not in RECOMBINATION_OFF_TABLE:
            raise InputError(
                "thresholds.recombination_off_table",
                self.recombination_off_table,
                " or ".join(RECOMBINATION_OFF_TABLE),
            )
        if isinstance(self.minimum_readings, bool) or self.minimum_readings not in range(1, 101):
            raise InputError("thresholds.minimum_readings", self.minimum_readings, "1 to 100")
        sign = self.charge_sign_for_positive_bias
        if isinstance(sign, bool) or sign not in (None, 1, -1):
            raise InputError(
                "thresholds.charge_sign_for_positive_bias",
                self.charge_sign_for_positive_bias,
                "1, -1 or not given",
            )


def _readings_for_trends(limits: Thresholds) -> int:
    """Return how many readings a set needs before its drift, settling and outliers are judged."""
    return max(limits.minimum_readings, MINIMUM_FOR_TRENDS)


def _set_size_flags(label: str, key: str, stats: SetStatistics, limits: Thresholds) -> list[Flag]:
    if stats.count == 1:
        return [
            Flag(
                f"{key}_single_reading",
                f"The {label} set has one reading: its SD is undefined, so its scatter and its "
                "Type A uncertainty cannot be estimated yet. Take more readings.",
                "info",
            )
        ]
    if stats.count < _readings_for_trends(limits):
        return [
            Flag(
                f"{key}_few_readings",
                f"The {label} set has {stats.count} readings; at least "
                f"{_readings_for_trends(limits)} are needed to judge drift and outliers.",
                "info",
            )
        ]
    return []


#: Identical readings this many or more in one set suggest a frozen electrometer: repeat
#: readings of a real chamber differ in their last displayed digits (common practice).
IDENTICAL_READINGS_MIN = 3


def _scatter_flags(label: str, key: str, stats: SetStatistics, limits: Thresholds) -> list[Flag]:
    flags = []
    if stats.count >= IDENTICAL_READINGS_MIN and stats.sd_nC == 0.0:
        flags.append(
            Flag(
                f"{key}_identical",
                f"All {stats.count} {label} readings are identical ({stats.mean_nC:.6g} nC): "
                "a chamber's repeat readings always differ a little. Check that the "
                "electrometer is not frozen or repeating a held value and that the beam was "
                "delivered for every reading, then redo the set.",
            )
        )
    if stats.relative_sd_pct is not None and stats.relative_sd_pct > limits.relative_sd_pct:
        flags.append(
            Flag(
                f"{key}_sd_high",
                f"The {label} readings scatter by {stats.relative_sd_pct:.3f} % (relative SD), "
                f"above the {limits.relative_sd_pct:g} % limit. Check the cable, connections and "
                "beam, then take more readings or redo the set.",
            )
        )
    if (
        stats.relative_range_pct is not None
        and stats.relative_range_pct > limits.relative_range_pct
    ):
        flags.append(
            Flag(
                f"{key}_range_high",
                f"The {label} readings span {stats.relative_range_pct:.3f} % of their mean "
                f"(max − min), above the {limits.relative_range_pct:g} % limit. Look for a "
                "stray reading before accepting the set.",
            )
        )
    return flags


def _trend_flags(label: str, key: str, stats: SetStatistics, limits: Thresholds) -> list[Flag]:
    flags = []
    drift = stats.drift_pct_per_reading
    if drift is not None and abs(drift) > limits.drift_pct_per_reading:
        flags.append(
            Flag(
                f"{key}_drift",
                f"The {label} readings drift by {drift:+.3f} % per reading, beyond the "
                f"±{limits.drift_pct_per_reading:g} % limit. The chamber may still be settling "
                "or the temperature changing: wait, then redo the set.",
            )
        )
    offset = stats.first_reading_offset_pct
    if offset is not None and abs(offset) > limits.settling_pct:
        flags.append(
            Flag(
                f"{key}_not_settled",
                f"The first {label} reading differs from the others by {offset:+.3f} %, beyond "
                f"±{limits.settling_pct:g} %: the chamber had probably not settled after the "
                "bias change. Pre-irradiate, then redo the set.",
            )
        )
    if stats.outliers:
        numbers = ", ".join(str(i + 1) for i in stats.outliers)
        flags.append(
            Flag(
                f"{key}_outlier",
                f"{label.capitalize()} reading(s) {numbers} stand apart from the rest (modified "
                f"z-score above {limits.outlier_modified_z:g}, and more than "
                f"{limits.outlier_floor_pct:g} % from the median). Look for a spike or an "
                "interrupted beam; if you find a cause, redo the set and record the reason in "
                "the session notes. Every reading stays in the record and in the mean.",
            )
        )
    return flags


def set_flags(key: str, stats: SetStatistics, limits: Thresholds) -> list[Flag]:
    """Return the flags for one reading set; ``key`` is "routine", "opposite" or "reduced"."""
    label = SET_NAMES.get(key, key)
    flags = _set_size_flags(label, key, stats, limits) + _scatter_flags(label, key, stats, limits)
    if stats.count >= _readings_for_trends(limits):
        flags += _trend_flags(label, key, stats, limits)
    return flags


#: The highest dose rate a clinical linac delivers, MU/min: flattening-filter-free beams reach
#: about 2400 MU/min (from memory). No delivery of N MU can take less than N / this.
MAX_DOSE_RATE_MU_PER_MIN = 2400.0
#: A set's charge per MU this far (%) from the routine set's is beyond what polarity (k_pol
#: within a few tenths of a percent) and recombination at a reduced bias (k_s up to 1.05, a few
#: percent) explain: a wrong MU, a moved chamber or a wrong range (common practice).
CHARGE_PER_MU_DEVIATION_PCT = 10.0


def integration_time_flags(
    label: str, key: str, integration_s: Sequence[float], monitor_units: float
) -> list[Flag]:
    """Return a flag if readings of ``monitor_units`` MU each were integrated for less time (s)
    than the delivery takes even at MAX_DOSE_RATE_MU_PER_MIN."""
    if not monitor_units > 0:
        return []
    needed_s = monitor_units * 60.0 / MAX_DOSE_RATE_MU_PER_MIN
    short = [t for t in integration_s if t < needed_s]
    if not short:
        return []
    return [
        Flag(
            f"{key}_integration_too_short",
            f"{len(short)} of the {label} readings were integrated for {min(short):.2g} s at "
            f"the shortest, but {monitor_units:g} MU take at least {needed_s:.2g} s even at "
            f"{MAX_DOSE_RATE_MU_PER_MIN:g} MU/min: the beam cannot have been delivered in that "
            "time. Check that the electrometer integrates (not a held or repeated value) and "
            "that the end of beam was not declared early, then redo the set.",
        )
    ]


def charge_per_MU_flags(
    label: str, key: str, nC_per_MU: float, reference: str, reference_nC_per_MU: float
) -> list[Flag]:
    """Return a flag if a set's charge per MU (nC/MU) is further than
    CHARGE_PER_MU_DEVIATION_PCT from the ``reference`` set's (signs ignored)."""
    if not (_finite_number(nC_per_MU) and _finite_number(reference_nC_per_MU)):
        return []
    if reference_nC_per_MU == 0.0:
        return []
    deviation_pct = (abs(nC_per_MU) / abs(reference_nC_per_MU) - 1.0) * 100.0
    if abs(deviation_pct) <= CHARGE_PER_MU_DEVIATION_PCT:
        return []
    return [
        Flag(
            f"{key}_charge_per_MU",
            f"The {label} set gives {abs(nC_per_MU):.4g} nC per MU, {deviation_pct:+.1f} % from "
            f"the {reference} set's {abs(reference_nC_per_MU):.4g} nC per MU: more than polarity "
            f"and recombination explain (over {CHARGE_PER_MU_DEVIATION_PCT:g} %). Check the MU "
            "delivered, the chamber's position and the electrometer's range, then redo the set.",
        )
    ]


def k_pol_flags(k_pol: float, symbol: str, limits: Thresholds) -> list[Flag]:
    """Return a flag when |k_pol − 1| exceeds the usual limit for a reference-class chamber."""
    deviation_pct = 100.0 * abs(k_pol - 1.0)
    if deviation_pct <= limits.k_pol_deviation_pct:
        return []
    return [
        Flag(
            "k_pol_large",
            f"{symbol} = {k_pol:.4f} differs from 1 by {deviation_pct:.2f} %, more than the "
            f"{limits.k_pol_deviation_pct:g} % usual for a reference-class chamber. Check the "
            "chamber, its cable and that both sets had settled before relying on it.",
        )
    ]


def k_s_flags(
    k_s: float, symbol: str, limits: Thresholds, charge_ratio: float | None = None
) -> list[Flag]:
    """Return flags when k_s (dimensionless) is above the largest correction the protocols
    accept, or when k_s or the charge ratio M1/M2 (routine over reduced-bias mean, dimensionless;
    None: not known) is below 1 beyond rounding and scatter, which is physically impossible.
    """
    flags = []
    if k_s > limits.k_s_max:
        flags.append(
            Flag(
                "k_s_large",
                f"{symbol} = {k_s:.4f} is above {limits.k_s_max:g}: recombination is too large "
                "for this chamber in this beam. Use a chamber with a smaller electrode gap, a "
                "higher bias, or a lower dose per pulse.",
            )
        )
    low_k_s = k_s < limits.k_s_min
    low_ratio = charge_ratio is not None and charge_ratio < limits.charge_ratio_min
    if low_k_s or low_ratio:
        ratio_text = "" if charge_ratio is None else f" (M1/M2 = {charge_ratio:.5f})"
        flags.append(
            Flag(
                "k_s_below_one",
                f"{symbol} = {k_s:.4f} is below 1{ratio_text}: the reduced-bias readings are "
                "larger than the routine ones, which is impossible (a collection efficiency "
                "above 1), and the dose would come out too low. Check that the routine and "
                "reduced-bias sets are not swapped, that the chamber had settled after the bias "
                "change (pre-irradiate and repeat the first set after it), and that the bias set "
                "on the electrometer is the one entered for each set. Do not use this dose "
                "until the sets are redone.",
                severity="error",
            )
        )
    return flags


def leakage_flags(
    leakage_nC: float, routine_mean_nC: float, limits: Thresholds, subtracted: bool = False
) -> list[Flag]:
    """Return a flag when the leakage charge exceeds its limit as a share of the reading.

    ``subtracted``: the operator chose to subtract the leakage (the words say which).
    """
    share_pct = 100.0 * abs(leakage_nC) / abs(routine_mean_nC)
    if share_pct <= limits.leakage_pct:
        return []
    treated = (
        "it is subtracted from the routine reading, as chosen"
        if subtracted
        else "the leakage is not subtracted"
    )
    return [
        Flag(
            "leakage_high",
            f"Leakage of {leakage_nC:g} nC is {share_pct:.3f} % of the routine reading, above "
            f"{limits.leakage_pct:g} %. Check the cable and connectors and let the system "
            f"settle; {treated}.",
        )
    ]


def _span(values: Sequence[float]) -> float:
    return float(np.ptp(np.asarray(values, dtype=float))) if len(values) >= 2 else 0.0


def environment_flags(
    temperatures_C: Sequence[float], pressures_kPa: Sequence[float], limits: Thresholds
) -> list[Flag]:
    """Return flags when temperature or pressure changed by more than its limit in a session."""
    flags = []
    change_C = _span(temperatures_C)
    if change_C > limits.temperature_change_C:
        flags.append(
            Flag(
                "temperature_changing",
                f"The temperature changed by {change_C:.2f} °C during the session, more than "
                f"{limits.temperature_change_C:g} °C: the phantom was not in thermal "
                "equilibrium. Wait until it is steady, then repeat the readings.",
            )
        )
    change_kPa = _span(pressures_kPa)
    if change_kPa > limits.pressure_change_kPa:
        flags.append(
            Flag(
                "pressure_changing",
                f"The pressure changed by {change_kPa:.2f} kPa during the session, more than "
                f"{limits.pressure_change_kPa:g} kPa. Record the pressure at each set and "
                "check the barometer.",
            )
        )
    return flags


def humidity_flags(humidity_pct: float | None) -> list[Flag]:
    """Return a flag stating how k_h was chosen: assumed, or entered outside its band."""
    if humidity_pct is None:
        return [
            Flag(
                "k_h_assumed",
                f"No humidity entered: k_h = 1 is used, which holds between {BAND_LOW_PCT:g} % "
                f"and {BAND_HIGH_PCT:g} % relative humidity.",
                "info",
            )
        ]
    if humidity_in_band(humidity_pct):
        return []
    return [
        Flag(
            "humidity_out_of_band",
            f"Relative humidity {humidity_pct:g} % lies outside {BAND_LOW_PCT:g}–"
            f"{BAND_HIGH_PCT:g} %, where k_h = 1 holds; k_h = 1 was still used. Apply your code "
            "of practice's humidity correction by hand.",
        )
    ]


def sign_flags(routine_bias_V: float, routine_mean_nC: float, limits: Thresholds) -> list[Flag]:
    """Return a flag when the routine charge's sign contradicts the electrometer's convention."""
    if limits.charge_sign_for_positive_bias is None:
        return []
    expected = limits.charge_sign_for_positive_bias * np.sign(routine_bias_V)
    if np.sign(routine_mean_nC) == expected:
        return []
    return [
        Flag(
            "sign_against_bias",
            f"The routine readings are {'negative' if routine_mean_nC < 0 else 'positive'} with "
            f"a {routine_bias_V:+g} V bias, but this electrometer gives "
            f"{'positive' if limits.charge_sign_for_positive_bias > 0 else 'negative'} charge "
            "for a positive bias. Check the bias setting and the cable.",
        )
    ]
