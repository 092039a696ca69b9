"""A delivery that stopped short: the reading referred to the monitor units planned.

Pure (no I/O). A reading's charge is proportional to the monitor units delivered (the monitor
chamber ends the beam at the MU set; common practice). When a delivery stopped short of the MU
planned and the linac's console states the MU actually delivered, the reading is referred to the
planned MU, so that the set's mean, the charge per MU and the dose per MU all use the actual MU
(docs/physics.md, section 4):

    M_at_planned = M_read · MU_planned / MU_actual
"""

from __future__ import annotations

import math

from chargebook.corrections.errors import InputError


def check_actual_MU(actual_MU: object, planned_MU: float) -> float:
    """Return ``actual_MU`` checked: a finite number of MU above 0 and below ``planned_MU``
    (a delivery that stopped short). Raises InputError naming ``actual_MU``."""
    allowed = f"more than 0 and less than {planned_MU:g} MU, the MU planned for the reading"
    if (
        isinstance(actual_MU, bool)
        or not isinstance(actual_MU, int | float)
        or not math.isfinite(actual_MU)
    ):
        raise InputError("actual_MU", actual_MU, allowed, "is not a number")
    if not 0 < actual_MU < planned_MU:
        raise InputError("actual_MU", actual_MU, allowed)
    return float(actual_MU)


def charge_at_planned_MU_nC(charge_nC: float, planned_MU: float, actual_MU: float) -> float:
    """Return the charge (nC) the reading would have had at the planned MU."""
    return charge_nC * planned_MU / check_actual_MU(actual_MU, planned_MU)
