"""Corrected charge, absorbed dose to water, dose per monitor unit and the deviation from the
expected output.

    M_Q  = |M_raw| · k_TP · k_h · k_pol · k_s · k_elec       (TRS-398; TG-51 writes
                                                               M = P_ion P_TP P_elec P_pol M_raw)
    D_w  = M_Q · N_D,w · k_Q                                   (Gy, with M in nC, N_D,w in Gy/nC)

Tolerances default to AAPM TG-142 (Klein et al., Med. Phys. 36, 4197, 2009): output constancy
3 % daily, 2 % monthly; annual calibration within 1 % (the last from memory).
Scalars or numpy arrays broadcast.
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType

import numpy as np
from chargebook.corrections.errors import InputError
from chargebook.corrections.limits import (
    CHARGE_NC,
    EXPECTED_CGY_PER_MU,
    K_Q,
    MONITOR_UNITS,
    N_DW_GY_PER_NC,
    TOLERANCE_PCT,
    Number,
    as_number,
)

CGY_PER_GY = 100.0

#: Named tolerances (%), AAPM TG-142: daily and monthly output constancy; annual (from memory).
NAMED_TOLERANCES_PCT: Mapping[str, float] = MappingProxyType(
    {"daily": 3.0, "monthly": 2.0, "annual": 1.0}
)
#: The tolerance used when none is given: TG-142 monthly output constancy.
DEFAULT_TOLERANCE_NAME = "monthly"


def tolerance_pct(value: object) -> float:
    """Return a tolerance in % from a number or a name ("daily", "monthly", "annual")."""
    if isinstance(value, str):
        try:
            return NAMED_TOLERANCES_PCT[value.strip().lower()]
        except KeyError:
            allowed = ", ".join(NAMED_TOLERANCES_PCT) + f" or {TOLERANCE_PCT.text()}"
            raise InputError("tolerance_pct", value, allowed, "is not a known tolerance") from None
    return float(TOLERANCE_PCT.check("tolerance_pct", value))


def corrected_charge_nC(M_raw_nC: object, *factors: Number) -> Number:
    """Return the corrected charge |M_raw| · Π factors in nC (a magnitude, whatever the sign)."""
    charge = np.abs(CHARGE_NC.check("M_raw_nC", M_raw_nC))
    for factor in factors:
        charge = charge * as_number("correction factor", factor, "a number")
    return charge


def dose_to_water_Gy(M_corrected_nC: object, N_Dw_Gy_per_nC: object, k_Q: object) -> Number:
    """Return the absorbed dose to water D_w = M · N_D,w · k_Q in Gy (M in nC, N_D,w in Gy/nC)."""
    charge = CHARGE_NC.check("M_corrected_nC", M_corrected_nC)
    coefficient = N_DW_GY_PER_NC.check("N_Dw_Gy_per_nC", N_Dw_Gy_per_nC)
    quality = K_Q.check("k_Q", k_Q)
    return np.abs(charge) * coefficient * quality


def dose_per_MU_cGy(dose_Gy: Number, monitor_units: object) -> Number:
    """Return the dose per monitor unit in cGy/MU from a dose in Gy and the monitor units given."""
    return dose_Gy * CGY_PER_GY / MONITOR_UNITS.check("monitor_units", monitor_units)


def deviation_pct(measured_cGy_per_MU: Number, expected_cGy_per_MU: object) -> Number:
    """Return the deviation of the measured from the expected output, in % of the expected."""
    expected = EXPECTED_CGY_PER_MU.check("expected_cGy_per_MU", expected_cGy_per_MU)
    return 100.0 * (measured_cGy_per_MU - expected) / expected


def within_tolerance(deviation: Number, tolerance: float) -> bool | np.ndarray:
    """Return True where |deviation| (%) is within ``tolerance`` (%)."""
    return np.abs(deviation) <= tolerance
