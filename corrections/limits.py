"""Plausible input ranges and the checks that refuse anything outside them.

The ranges are common practice (see docs/physics.md, "Plausible input ranges"): water or air
temperature 10–40 °C, pressure 60–110 kPa (high-altitude clinics sit near 70–80 kPa), bias
magnitude 10–1000 V. The others are wide plausibility bounds that catch unit mistakes (an N_D,w
typed in Gy/C into a Gy/nC field, a negative coefficient) without judging a physicist's choice.

Every check accepts a scalar or a numpy array and returns a float or a float array; for an array
the error names the first offending element, e.g. ``temperature_C[3]``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from chargebook.corrections.errors import InputError

#: A scalar or an array of values; every factor function takes either and broadcasts.
Number = float | np.ndarray


def _index_text(array: np.ndarray, flat_index: int) -> str:
    index = np.unravel_index(flat_index, array.shape)
    return ",".join(str(int(i)) for i in index)


def as_number(field: str, value: object, allowed: str) -> Number:
    """Return ``value`` as a float (or float array); raise InputError unless numeric and finite."""
    if value is None or isinstance(value, bool | str | bytes):
        raise InputError(field, value, allowed, "is not a number")
    if isinstance(value, int | float | np.integer | np.floating):
        number = float(value)
        if not np.isfinite(number):
            raise InputError(field, value, allowed, "is not a finite number")
        return number
    try:
        array = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(field, value, allowed, "is not a number") from None
    if array.ndim == 0:
        return as_number(field, float(array), allowed)
    finite = np.isfinite(array)
    if not finite.all():
        first = int(np.flatnonzero(~finite)[0])
        name = f"{field}[{_index_text(array, first)}]"
        raise InputError(name, array.flat[first], allowed, "is not a finite number")
    return array


def first_where(value: object, mask: object) -> float:
    """Return the first element of ``value`` (broadcast to ``mask``) where ``mask`` is true."""
    mask = np.asarray(mask, dtype=bool)
    broadcast = np.broadcast_to(np.asarray(value, dtype=float), mask.shape)
    return float(broadcast[mask].flat[0]) if mask.ndim else float(broadcast)


@dataclass(frozen=True)
class Range:
    """A closed interval ``low``..``high`` in ``unit`` that an input must lie in."""

    low: float
    high: float
    unit: str = ""

    def text(self) -> str:
        """Return the range in words, e.g. "10 to 40 °C"."""
        unit = f" {self.unit}" if self.unit else ""
        return f"{self.low:g} to {self.high:g}{unit}"

    def check(self, field: str, value: object) -> Number:
        """Return ``value`` as a number; raise InputError naming ``field`` if outside the range."""
        number = as_number(field, value, self.text())
        if isinstance(number, float):
            if not self.low <= number <= self.high:
                raise InputError(field, number, self.text())
            return number
        outside = (number < self.low) | (number > self.high)
        if outside.any():
            first = int(np.flatnonzero(outside)[0])
            raise InputError(
                f"{field}[{_index_text(number, first)}]", number.flat[first], self.text()
            )
        return number

    def scaled(self, factor: float, unit: str) -> Range:
        """Return the same range expressed in another unit (value_in_new_unit = value * factor)."""
        return Range(self.low * factor, self.high * factor, unit)


TEMPERATURE_C = Range(10.0, 40.0, "°C")
PRESSURE_KPA = Range(60.0, 110.0, "kPa")
BIAS_MAGNITUDE_V = Range(10.0, 1000.0, "V")
HUMIDITY_PCT = Range(0.0, 100.0, "%")
K_Q = Range(0.8, 1.2)
K_ELEC = Range(0.9, 1.1)
#: Any measured correction factor given directly (k_pol, k_s) in a batch re-analysis.
CORRECTION_FACTOR = Range(0.5, 1.5)
N_DW_GY_PER_NC = Range(1e-4, 100.0, "Gy/nC")
MONITOR_UNITS = Range(0.1, 100000.0, "MU")
EXPECTED_CGY_PER_MU = Range(0.01, 10.0, "cGy/MU")
TOLERANCE_PCT = Range(0.01, 20.0, "%")
UNCERTAINTY_PCT = Range(0.0, 50.0, "%")
U_TEMPERATURE_C = Range(0.0, 5.0, "°C")
U_PRESSURE_KPA = Range(0.0, 5.0, "kPa")
#: Leakage charge over one reading's duration, either sign; wide bound, flagged by stability.
LEAKAGE_NC = Range(-1e6, 1e6, "nC")
#: Charge readings, either sign; an exact zero is refused elsewhere because it carries no sign.
CHARGE_NC = Range(-1e9, 1e9, "nC")
#: The coverage factor a calibration certificate states for its expanded uncertainty.
CERTIFICATE_K = Range(1.0, 4.0)
#: R50 of an electron beam, cm: clinical beams run from about 1.5 cm (4 MeV) to about 10 cm
#: (25 MeV); kept wide to catch a value typed in mm rather than judge a beam (common practice).
R50_CM = Range(1.0, 20.0, "cm")
#: Coverage probability of an expanded uncertainty.
COVERAGE_PROBABILITY = Range(0.5, 0.999)
