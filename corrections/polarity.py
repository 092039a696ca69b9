"""k_pol (TG-51: P_pol), the correction for the polarity effect of a chamber.

TRS-398:  k_pol = (|M+| + |M−|) / (2 |M|), with M the reading at the routine polarity.
TG-51:    P_pol = |(M+ − M−) / (2 M)|, with signed readings.

With M+ and M− of opposite sign the two are the same number; both are given so that the identity
can be checked. Readings are mean charges in nC, signed as read; scalars or arrays broadcast.
"""

from __future__ import annotations

import numpy as np
from chargebook.corrections.errors import InputError
from chargebook.corrections.limits import CHARGE_NC, Number, first_where


def _nonzero(field: str, value: object) -> Number:
    charge = CHARGE_NC.check(field, value)
    if np.any(charge == 0):
        raise InputError(field, 0.0, "a non-zero charge in nC", "carries no sign")
    return charge


def _refuse_same_sign(first: Number, second: Number, names: tuple[str, str]) -> None:
    """Refuse readings at opposite biases that share a sign: reversing the bias reverses it."""
    same_sign = np.sign(first) == np.sign(second)
    if np.any(same_sign):
        raise InputError(
            names[1],
            first_where(second, same_sign),
            f"a charge of the opposite sign to {names[0]}",
            f"has the same sign as {names[0]}",
        )


def k_pol(routine_nC: object, opposite_nC: object) -> Number:
    """Return k_pol (dimensionless) from the mean routine and opposite-polarity readings (nC).

    Raises InputError when the two readings have the same sign: reversing the bias must
    reverse the sign of the collected charge.
    """
    routine = _nonzero("routine_nC", routine_nC)
    opposite = _nonzero("opposite_nC", opposite_nC)
    _refuse_same_sign(routine, opposite, ("routine_nC", "opposite_nC"))
    return (np.abs(routine) + np.abs(opposite)) / (2.0 * np.abs(routine))


def P_pol(plus_nC: object, minus_nC: object, routine_nC: object) -> Number:
    """Return TG-51's P_pol = |(M+ − M−)/(2M)| from signed readings at + and − bias (nC).

    ``routine_nC`` is M+ or M−, whichever polarity is routine. Raises InputError when M+ and
    M− share a sign (the formula is only right for readings of opposite sign).
    """
    plus = _nonzero("plus_nC", plus_nC)
    minus = _nonzero("minus_nC", minus_nC)
    routine = _nonzero("routine_nC", routine_nC)
    _refuse_same_sign(plus, minus, ("plus_nC", "minus_nC"))
    return np.abs((plus - minus) / (2.0 * routine))


def k_pol_relative_sensitivity(routine_nC: Number, opposite_nC: Number) -> tuple[Number, Number]:
    """Return ∂ln(M·k_pol)/∂ln|M| and ∂ln(M·k_pol)/∂ln|M_opp|: the shares |M|/Σ and |M_opp|/Σ.

    M·k_pol = (|M| + |M_opp|)/2, so the corrected charge depends on the two readings only
    through their mean magnitude; these are the GUM sensitivity coefficients in relative form.
    """
    total = np.abs(routine_nC) + np.abs(opposite_nC)
    return np.abs(routine_nC) / total, np.abs(opposite_nC) / total
