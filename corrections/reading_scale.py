"""Readings on the scale a report plots them: deviation from the set's mean in % of the mean,
and the resolution the charges were recorded at.

Pure (numpy only, no I/O): the report draws each set in % of its mean, with tick labels no finer
than the resolution of the readings as recorded (an instrument that reads to 0.001 nC cannot
show a 0.0001 % step on a 15 nC mean).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

#: The finest resolution looked for, in nC (six decimals: 1 fC; common practice for reference
#: class electrometers is 0.01 pC to 1 pC).
FINEST_RESOLUTION_nC = 1e-6


def deviations_from_mean_pct(charges_nC: Sequence[float], mean_nC: float) -> tuple[float, ...]:
    """Return each charge's deviation from ``mean_nC``, in % of the mean (signed, %)."""
    if mean_nC == 0 or not math.isfinite(mean_nC):
        raise ValueError(f"mean_nC is {mean_nC!r}: a deviation in % needs a finite, non-zero mean")
    array = np.asarray(charges_nC, dtype=float)
    return tuple(float(v) for v in 100.0 * (array / mean_nC - 1.0))


def recorded_resolution_nC(charges_nC: Sequence[float]) -> float | None:
    """Return the coarsest power-of-ten step (nC) every charge is a whole multiple of.

    E.g. 14.762 and 14.758 give 0.001 nC. None for no charges, or charges finer than
    :data:`FINEST_RESOLUTION_nC` (a value that was computed, not read).
    """
    array = np.asarray(charges_nC, dtype=float)
    if array.size == 0:
        return None
    multiples = array / _STEPS_nC[:, None]  # every step at once: a report draws hundreds of sets
    whole = np.all(np.abs(multiples - np.round(multiples)) < 1e-6, axis=-1)
    return float(_STEPS_nC[np.argmax(whole)]) if whole.any() else None


def _steps_nC() -> np.ndarray:
    """Return the steps looked at, coarsest first: 1 nC, divided by ten down to
    :data:`FINEST_RESOLUTION_nC`."""
    steps, step = [], 1.0
    while step >= FINEST_RESOLUTION_nC * 0.5:
        steps.append(step)
        step /= 10.0
    return np.array(steps)


_STEPS_nC = _steps_nC()


def resolution_pct(resolution_nC: float, mean_nC: float) -> float:
    """Return a charge resolution (nC) as a percentage of ``mean_nC`` (%)."""
    return 100.0 * resolution_nC / abs(mean_nC)
