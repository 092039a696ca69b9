"""Leakage charge scaled from the time it was measured over to the time of one reading.

With the beam off, an ionization chamber and its electrometer still collect a small charge:
the leakage current, taken as steady over a session (common practice). A leakage set measures
it over its own integration time; what matters for a reading is the charge leaked during that
reading's integration, so the measured charge is scaled by the ratio of the times.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

from chargebook.corrections.errors import InputError


def leakage_per_reading_nC(
    leakage_charge_nC: float, leakage_time_s: float, reading_times_s: Sequence[float]
) -> float:
    """Return the leakage charge (nC) collected over one reading's mean integration time.

    ``leakage_charge_nC`` was collected over ``leakage_time_s`` seconds with the beam off;
    ``reading_times_s`` are the integration times (s) of the readings it is compared with.
    Raises InputError naming the field for a leakage time that is not a positive number, a
    reading time that is negative or not finite, or an empty list of readings.
    """
    if not math.isfinite(leakage_charge_nC):
        raise InputError("leakage_charge_nC", leakage_charge_nC, "a finite number")
    if not (math.isfinite(leakage_time_s) and leakage_time_s > 0):
        raise InputError("leakage_time_s", leakage_time_s, "a positive number of seconds")
    if not reading_times_s:
        raise InputError("reading_times_s", list(reading_times_s), "at least one reading time")
    for index, seconds in enumerate(reading_times_s):
        if not (math.isfinite(seconds) and seconds >= 0):
            raise InputError(f"reading_times_s[{index}]", seconds, "a number of seconds ≥ 0")
    mean_reading_s = math.fsum(reading_times_s) / len(reading_times_s)
    return leakage_charge_nC * mean_reading_s / leakage_time_s
