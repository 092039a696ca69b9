"""Statistics of one reading set: how well repeated readings agree, and whether they wander.

Mean, SD (ddof = 1), relative SD (%), standard error of the mean, relative range (%), drift
slope (least squares against reading number, % of the mean per reading), the first reading's
offset from the rest (a sign of a chamber still settling), and outliers by the modified z-score
M_i = 0.6745 (x_i − median) / MAD with the threshold 3.5 (Iglewicz and Hoaglin, "How to Detect
and Handle Outliers", ASQC 1993). When the MAD is zero (quantised readings, most of them
identical) the mean absolute deviation scaled by 1.253314 stands in for it (common practice).
A reading within ``OUTLIER_FLOOR_PCT`` (0.05 %) of the median is never an outlier: with four
readings 0.03 % apart the MAD is tiny and the z-score alone would call a perfectly good reading
an outlier (common practice; a setting).

Statistics that a set is too small to define (SD with one reading, drift with fewer than three)
are None: said, not guessed. The array functions work along the last axis for many sets at once.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, fields

import numpy as np
from chargebook.corrections.errors import InputError
from chargebook.corrections.limits import CHARGE_NC

#: Iglewicz & Hoaglin (1993): 0.6745 = the 0.75 quantile of the standard normal; 3.5 = cut-off.
MODIFIED_Z_SCALE = 0.6745
MODIFIED_Z_THRESHOLD = 3.5
#: Mean absolute deviation scale used when the MAD is zero (common practice).
MEAN_ABSOLUTE_DEVIATION_SCALE = 1.253314
#: A reading within this % of the set's median is never an outlier (common practice).
OUTLIER_FLOOR_PCT = 0.05
#: Fewest readings for which drift, settling and outliers are judged.
MINIMUM_FOR_TRENDS = 3


def mean_nC(readings_nC: np.ndarray) -> np.ndarray:
    """Return the mean charge (nC) along the last axis."""
    return np.mean(readings_nC, axis=-1)


def relative_sd_pct(readings_nC: np.ndarray) -> np.ndarray:
    """Return the relative sample SD (ddof = 1) in % of |mean| along the last axis."""
    return 100.0 * np.std(readings_nC, axis=-1, ddof=1) / np.abs(np.mean(readings_nC, axis=-1))


def relative_range_pct(readings_nC: np.ndarray) -> np.ndarray:
    """Return (max − min) in % of |mean| along the last axis."""
    spread = np.max(readings_nC, axis=-1) - np.min(readings_nC, axis=-1)
    return 100.0 * spread / np.abs(np.mean(readings_nC, axis=-1))


def drift_pct_per_reading(readings_nC: np.ndarray) -> np.ndarray:
    """Return the least-squares slope against reading number, in % of the mean per reading.

    Positive means the magnitude grows from reading to reading, whatever the sign of the charge.
    """
    readings = np.asarray(readings_nC, dtype=float)
    index = np.arange(readings.shape[-1], dtype=float)
    index -= index.mean()
    mean = readings.mean(axis=-1)
    slope = (readings - mean[..., None]) @ index / (index @ index)
    return 100.0 * slope / mean


def median(values: np.ndarray, *, keepdims: bool = False) -> np.ndarray:
    """Return the median along the last axis, as ``np.median`` computes it: the mean
    (``np.mean``) of the middle one or two of the ordered values, NaN where a value is NaN.

    ``np.median`` looks for masked arrays on every call, which imports ``numpy.ma`` (tens of
    milliseconds) the first time: a report of hundreds of sets starts faster without it.
    """
    values = np.asarray(values)
    count = values.shape[-1]
    if count == 0:
        return np.median(values, axis=-1, keepdims=keepdims)
    ordered = np.sort(values, axis=-1)  # NaN sorts last, as np.median's partition puts it
    middle = np.mean(ordered[..., (count - 1) // 2 : count // 2 + 1], axis=-1, keepdims=True)
    found = np.where(np.isnan(ordered[..., -1:]), np.nan, middle)
    return (found if keepdims else found[..., 0])[()]


def modified_z_scores(readings_nC: np.ndarray) -> np.ndarray:
    """Return Iglewicz and Hoaglin's modified z-scores of the readings along the last axis."""
    readings = np.asarray(readings_nC, dtype=float)
    median_nC = median(readings, keepdims=True)
    deviation = readings - median_nC
    mad = median(np.abs(deviation), keepdims=True)
    mean_ad = np.mean(np.abs(deviation), axis=-1, keepdims=True) * MEAN_ABSOLUTE_DEVIATION_SCALE
    mad_z_scale = np.where(mad > 0, mad / MODIFIED_Z_SCALE, mean_ad)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(mad_z_scale > 0, deviation / mad_z_scale, 0.0)
    return z


def first_reading_offset_pct(readings_nC: np.ndarray) -> np.ndarray:
    """Return the first reading's offset from the mean of the others, in % of that mean."""
    readings = np.asarray(readings_nC, dtype=float)
    rest = readings[..., 1:].mean(axis=-1)
    return 100.0 * (readings[..., 0] - rest) / rest


@dataclass(frozen=True)
class SetStatistics:
    """The statistics of one reading set; None where the set is too small to define a value."""

    count: int
    mean_nC: float
    sd_nC: float | None
    relative_sd_pct: float | None
    standard_error_nC: float | None
    relative_range_pct: float | None
    drift_pct_per_reading: float | None
    first_reading_offset_pct: float | None
    outliers: tuple[int, ...]

    @property
    def relative_standard_error_pct(self) -> float | None:
        """Return the standard error of the mean in % of |mean|, or None with one reading."""
        if self.standard_error_nC is None:
            return None
        return 100.0 * self.standard_error_nC / abs(self.mean_nC)

    def to_dict(self) -> dict[str, object]:
        """Return the statistics as JSON-ready plain types."""
        # its fields are numbers and a tuple of ints: no deep copy (dataclasses.asdict) needed,
        # and the daemon builds this at every reading
        result: dict[str, object] = {name: getattr(self, name) for name in _STATISTICS_FIELDS}
        result["outliers"] = list(self.outliers)
        result["relative_standard_error_pct"] = self.relative_standard_error_pct
        return result


_STATISTICS_FIELDS = tuple(item.name for item in fields(SetStatistics))


def readings_array(field: str, readings_nC: Sequence[float] | np.ndarray) -> np.ndarray:
    """Return the readings as a 1-D float array; raise InputError if empty or not numbers."""
    try:
        one_dimensional = np.ndim(readings_nC) == 1
    except ValueError:
        one_dimensional = False
    if isinstance(readings_nC, str | bytes) or not one_dimensional:
        raise InputError(field, readings_nC, "a list of charges in nC", "is not a list of numbers")
    if len(readings_nC) == 0:
        raise InputError(field, [], "at least one reading", "is an empty reading set")
    plain = _plain_charges(readings_nC)
    if plain is not None:
        return plain
    for index, value in enumerate(readings_nC):  # names the first reading that is wrong
        CHARGE_NC.check(f"{field}[{index}]", value)
    return np.asarray(readings_nC, dtype=float)


def _plain_charges(readings_nC: Sequence[float] | np.ndarray) -> np.ndarray | None:
    """Return the readings as a float array when every one is a finite int or float within
    :data:`CHARGE_NC` (checked in one pass, as the daemon recomputes a set's statistics at
    every reading), else None: the caller then checks them one by one to name the wrong one."""
    if isinstance(readings_nC, np.ndarray):
        if readings_nC.dtype.kind not in "iuf":
            return None
    elif not all(type(value) is float or type(value) is int for value in readings_nC):
        return None  # bools, strings, None, numpy scalars: the one-by-one check words them
    array = np.asarray(readings_nC, dtype=float)
    inside = np.isfinite(array) & (array >= CHARGE_NC.low) & (array <= CHARGE_NC.high)
    return array if inside.all() else None


def set_statistics(
    readings_nC: Sequence[float] | np.ndarray,
    field: str = "readings_nC",
    outlier_threshold: float = MODIFIED_Z_THRESHOLD,
    outlier_floor_pct: float = OUTLIER_FLOOR_PCT,
) -> SetStatistics:
    """Return the statistics of one reading set (charges in nC, signed as read).

    Readings whose modified z-score exceeds ``outlier_threshold`` in magnitude and that lie
    more than ``outlier_floor_pct`` (%) from the median are outliers.
    The first reading's offset is None when the others average zero (it would be infinite).
    Raises InputError for an empty set or a value that is not a finite number.
    """
    readings = readings_array(field, readings_nC)
    count = readings.size
    mean, sd = _mean_and_sd(field, readings)
    se = rel_sd = rel_range = drift = offset = None
    outliers: tuple[int, ...] = ()
    if sd is not None:
        se = sd / np.sqrt(count)
        rel_sd = _relative_sd_pct(sd, mean)
        rel_range = float(relative_range_pct(readings))
    if count >= MINIMUM_FOR_TRENDS:
        drift = float(drift_pct_per_reading(readings))
        with np.errstate(divide="ignore", invalid="ignore"):
            offset_pct = float(first_reading_offset_pct(readings))
        # None when the other readings average zero: no offset relative to them exists
        offset = offset_pct if np.isfinite(offset_pct) else None
        z = modified_z_scores(readings)
        middle = median(readings)
        scale = abs(middle) if middle != 0 else abs(mean)
        apart = 100.0 * np.abs(readings - middle) / scale > outlier_floor_pct
        outliers = tuple(int(i) for i in np.flatnonzero((np.abs(z) > outlier_threshold) & apart))
    return SetStatistics(count, mean, sd, rel_sd, se, rel_range, drift, offset, outliers)


def _mean_and_sd(field: str, readings: np.ndarray) -> tuple[float, float | None]:
    """Return the mean (nC) and the sample SD (ddof = 1, nC; None with one reading) of a set's
    readings (a 1-D array); InputError when they average zero."""
    mean = float(readings.mean())
    if mean == 0:
        raise InputError(field, readings.tolist(), "readings with a non-zero mean", "averages zero")
    return mean, float(np.std(readings, ddof=1)) if readings.size >= 2 else None


def _relative_sd_pct(sd_nC: float, mean_nC: float) -> float:
    """Return an SD in % of the magnitude of the mean."""
    return 100.0 * sd_nC / abs(mean_nC)


@dataclass(frozen=True)
class SetSpread:
    """The mean and relative SD of one reading set: what a report shows of each of hundreds
    of sets, the same values :func:`set_statistics` gives."""

    count: int
    mean_nC: float
    relative_sd_pct: float | None  # None with one reading


def set_spread(readings_nC: Sequence[float] | np.ndarray, field: str = "readings_nC") -> SetSpread:
    """Return the mean and relative SD (%) of one reading set (charges in nC), computed as
    :func:`set_statistics` computes them, without the rest (drift, outliers ...). Raises
    InputError for an empty set, a value that is not a finite number, or a zero mean."""
    readings = readings_array(field, readings_nC)
    mean, sd = _mean_and_sd(field, readings)
    return SetSpread(readings.size, mean, None if sd is None else _relative_sd_pct(sd, mean))
