"""k_h, the humidity correction of a chamber calibrated in air near 50 % relative humidity.

Both protocols take k_h = 1 when the measurement is made between 20 % and 80 % RH with a chamber
calibrated near 50 % RH (docs/physics.md, from memory). Outside that band no correction is
tabulated here: the value stays 1 and :func:`humidity_in_band` lets the caller flag it.
"""

from __future__ import annotations

import numpy as np
from chargebook.corrections.limits import HUMIDITY_PCT, Number

#: The band of relative humidity (%) in which k_h = 1 applies.
BAND_LOW_PCT = 20.0
BAND_HIGH_PCT = 80.0


def k_h(humidity_pct: object) -> Number:
    """Return k_h (dimensionless, 1) for relative humidity ``humidity_pct`` (%, 0–100)."""
    humidity = HUMIDITY_PCT.check("humidity_pct", humidity_pct)
    return np.ones_like(humidity) if isinstance(humidity, np.ndarray) else 1.0


def humidity_in_band(humidity_pct: Number) -> bool | np.ndarray:
    """Return True where ``humidity_pct`` (%) lies in the 20–80 % band where k_h = 1 holds."""
    return (humidity_pct >= BAND_LOW_PCT) & (humidity_pct <= BAND_HIGH_PCT)
