"""The sign of a reading set: every reading of a set is taken at one bias, so shares one sign.

A set's sign is that of the majority of its readings (of its first reading on a tie). A reading
of the other sign, or an exact zero (which carries no sign), contradicts the bias of its set and
is refused with an InputError naming it. Whether a positive bias gives positive or negative
charge depends on the electrometer, so only the consistency within a set and between sets is
an error; the electrometer's own convention is a setting and its breach a flag
(``stability.sign_flags``).
"""

from __future__ import annotations

import numpy as np
from chargebook.corrections.errors import InputError


def _row_signs(rows: np.ndarray) -> np.ndarray:
    """Return the sign of each row of readings (the one rule: majority, first present reading
    on a tie); NaN marks no reading."""
    present = ~np.isnan(rows)
    positive = np.sum(rows > 0, axis=-1)
    negative = np.sum(rows < 0, axis=-1)
    first = rows[np.arange(rows.shape[0]), np.argmax(present, axis=-1)]
    tie_sign = np.where(first > 0, 1.0, -1.0)
    return np.where(positive > negative, 1.0, np.where(negative > positive, -1.0, tie_sign))


def set_sign(readings_nC: np.ndarray) -> float:
    """Return the sign (+1.0 or −1.0) of one set of readings (nC) under the one rule: that of
    the majority, of the first reading on a tie. An empty set has no sign: NaN."""
    readings = np.asarray(readings_nC, dtype=float)
    if readings.size == 0:
        return float("nan")
    return float(_row_signs(np.atleast_2d(readings))[0])


def contradicting(
    readings_nC: np.ndarray,
    set_readings_nC: np.ndarray | None = None,
    bias_V: float | None = None,
    charge_sign_for_positive_bias: float | None = None,
) -> np.ndarray:
    """Return, per reading (nC), True where its sign contradicts the bias of its set.

    A reading contradicts when its sign differs from the set's (:func:`set_sign` of
    ``set_readings_nC``, by default the readings themselves: a display may judge settling
    readings against the readings used for results) or is zero. When the electrometer's
    convention is known (``charge_sign_for_positive_bias``, with ``bias_V`` in V), a reading
    whose sign breaches it contradicts too.
    """
    readings = np.asarray(readings_nC, dtype=float)
    reference = readings if set_readings_nC is None else np.asarray(set_readings_nC, float)
    signs = np.sign(readings)
    wrong = signs != set_sign(reference) if reference.size else np.zeros(readings.shape, bool)
    if charge_sign_for_positive_bias is not None and bias_V is not None and bias_V != 0:
        wrong |= signs != charge_sign_for_positive_bias * np.sign(bias_V)
    return wrong


def set_signs(field: str, readings_nC: np.ndarray) -> np.ndarray | float:
    """Return the sign (+1.0 or −1.0) of each set along the last axis; NaN marks no reading.

    A 1-D array is one set (a float is returned); a 2-D array holds one set per row. Raises
    InputError naming the first reading whose sign differs from its set's, as ``field[i]`` for
    one set or ``field[row,i]`` for rows.
    """
    readings = np.asarray(readings_nC, dtype=float)
    rows = np.atleast_2d(readings)
    sign = _row_signs(rows)
    wrong = ~np.isnan(rows) & (np.sign(rows) != sign[:, None])
    if wrong.any():
        row, column = (int(i) for i in np.argwhere(wrong)[0])
        where = f"{column}" if readings.ndim == 1 else f"{row},{column}"
        raise InputError(
            f"{field}[{where}]",
            float(rows[row, column]),
            f"a {'negative' if sign[row] < 0 else 'positive'} charge like the rest of the set",
            "has a sign that contradicts the bias of its set",
        )
    return float(sign[0]) if readings.ndim == 1 else sign
