"""Re-analysis of many sessions, or many single readings, in one vectorised call.

Where :func:`~chargebook.corrections.evaluate.evaluate` takes one session, these functions take
numpy arrays: a year of sessions as rows (one row per session, one column per reading; rows with
fewer readings are padded with NaN), or a million readings each with its own temperature and
pressure. They call the same factor functions as ``evaluate``, so the numbers agree with it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from chargebook.corrections.air_density import k_TP
from chargebook.corrections.conventions import Convention
from chargebook.corrections.dose import deviation_pct, dose_per_MU_cGy, dose_to_water_Gy
from chargebook.corrections.errors import InputError
from chargebook.corrections.limits import CHARGE_NC, CORRECTION_FACTOR, K_ELEC
from chargebook.corrections.polarity import k_pol
from chargebook.corrections.recombination import Beam, k_s, voltage_ratio
from chargebook.corrections.signs import set_signs


@dataclass(frozen=True)
class BatchResult:
    """Per-session results, each an array with one element per session (row).

    ``dose_per_MU_cGy`` is None when no monitor units were given, ``deviation_pct`` when no
    expected output was given.
    """

    count: np.ndarray
    M_raw_nC: np.ndarray
    relative_sd_pct: np.ndarray
    k_TP: np.ndarray
    k_pol: np.ndarray
    k_s: np.ndarray
    M_corrected_nC: np.ndarray
    dose_Gy: np.ndarray
    dose_per_MU_cGy: np.ndarray | None
    deviation_pct: np.ndarray | None


def padded_sets(field: str, readings_nC: object) -> np.ndarray:
    """Return a 2-D float array of reading sets (rows), NaN-padded; refuse empty rows and inf."""
    array = np.atleast_2d(np.asarray(readings_nC, dtype=float))
    if array.ndim != 2:
        raise InputError(field, array.shape, "a 2-D array: sessions × readings", "has the shape")
    present = ~np.isnan(array)
    CHARGE_NC.check(field, np.where(present, array, 1.0))
    empty = ~present.any(axis=1)
    if empty.any():
        row = int(np.flatnonzero(empty)[0])
        raise InputError(f"{field}[{row}]", [], "at least one reading", "is an empty reading set")
    return array


#: Sign of each set relative to the routine set: the reduced bias keeps the routine polarity.
_SIGN_RELATIVE_TO_ROUTINE = {"opposite_nC": -1.0, "reduced_nC": 1.0}


def check_signs(routine: np.ndarray, others: dict[str, np.ndarray]) -> None:
    """Refuse rows whose readings contradict their bias, within a row or against the routine row.

    ``others`` maps "opposite_nC" and "reduced_nC" to their NaN-padded rows. Raises InputError
    naming the reading (``reduced_nC[3,1]``) or the row (``opposite_nC[3]``).
    """
    routine_sign = set_signs("routine_nC", routine)
    for field, rows in others.items():
        relation = _SIGN_RELATIVE_TO_ROUTINE[field]
        wrong = np.broadcast_to(set_signs(field, rows) != relation * routine_sign, (len(rows),))
        if wrong.any():
            row = int(np.flatnonzero(wrong)[0])
            words = "the opposite sign to" if relation < 0 else "the same sign as"
            raise InputError(
                f"{field}[{row}]",
                float(np.nanmean(rows[row])),
                f"charges of {words} the routine readings",
                "has a sign that contradicts its bias",
            )


def _mean(array: np.ndarray) -> np.ndarray:
    return np.nanmean(array, axis=1)


def _relative_sd_pct(array: np.ndarray) -> np.ndarray:
    count = np.sum(~np.isnan(array), axis=1)
    sd = np.full(array.shape[0], np.nan)
    several = count >= 2
    sd[several] = np.nanstd(array[several], axis=1, ddof=1)
    return 100.0 * sd / np.abs(_mean(array))


def evaluate_sessions(
    routine_nC: object,
    opposite_nC: object,
    reduced_nC: object,
    *,
    temperature_C: object,
    pressure_kPa: object,
    routine_bias_V: object,
    reduced_bias_V: object,
    N_Dw_Gy_per_nC: object,
    k_Q: object,
    k_elec: object = 1.0,
    monitor_units: object | None = None,
    expected_cGy_per_MU: object | None = None,
    convention: Convention | str = Convention.TRS398,
    beam: Beam | str = Beam.PULSED,
) -> BatchResult:
    """Return the factors, corrected charge (nC) and dose (Gy) of many sessions at once.

    Reading arrays are sessions × readings (NaN-padded, signed as read); every other input is a
    scalar or one value per session. k_elec here is an explicit input (1 for a chamber and
    electrometer calibrated together). Raises InputError as the single-session functions do.
    """
    routine = padded_sets("routine_nC", routine_nC)
    opposite = padded_sets("opposite_nC", opposite_nC)
    reduced = padded_sets("reduced_nC", reduced_nC)
    check_signs(routine, {"opposite_nC": opposite, "reduced_nC": reduced})
    M_raw = _mean(routine)
    air = k_TP(temperature_C, pressure_kPa, convention)
    polarity = k_pol(M_raw, _mean(opposite))
    n = voltage_ratio(routine_bias_V, reduced_bias_V, fields=("routine_bias_V", "reduced_bias_V"))
    recombination = k_s(M_raw / _mean(reduced), n, beam, convention)
    electrometer = K_ELEC.check("k_elec", k_elec)
    M_corrected = np.abs(M_raw) * air * polarity * recombination * electrometer
    dose = dose_to_water_Gy(M_corrected, N_Dw_Gy_per_nC, k_Q)
    per_MU = None if monitor_units is None else dose_per_MU_cGy(dose, monitor_units)
    deviation = None
    if per_MU is not None and expected_cGy_per_MU is not None:
        deviation = deviation_pct(per_MU, expected_cGy_per_MU)
    return BatchResult(
        count=np.sum(~np.isnan(routine), axis=1),
        M_raw_nC=M_raw,
        relative_sd_pct=_relative_sd_pct(routine),
        k_TP=np.broadcast_to(air, M_raw.shape),
        k_pol=polarity,
        k_s=np.broadcast_to(recombination, M_raw.shape),
        M_corrected_nC=M_corrected,
        dose_Gy=dose,
        dose_per_MU_cGy=per_MU,
        deviation_pct=deviation,
    )


def corrected_readings_nC(
    charge_nC: object,
    temperature_C: object,
    pressure_kPa: object,
    *,
    k_pol: object,
    k_s: object,
    k_elec: object,
    convention: Convention | str = Convention.TRS398,
) -> np.ndarray:
    """Return each reading's corrected charge |M|·k_TP·k_pol·k_s·k_elec in nC, element-wise.

    For re-analysing a long record of readings, each with the temperature and pressure logged
    when it was taken; the session factors k_pol, k_s and k_elec are given explicitly.
    """
    charge = np.abs(CHARGE_NC.check("charge_nC", charge_nC))
    air = k_TP(temperature_C, pressure_kPa, convention)
    polarity = CORRECTION_FACTOR.check("k_pol", k_pol)
    recombination = CORRECTION_FACTOR.check("k_s", k_s)
    return charge * air * polarity * recombination * K_ELEC.check("k_elec", k_elec)
