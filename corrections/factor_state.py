"""Where a correction factor's value comes from: its *state*, one word, defined here once.

Every reader (the results the daemon sends, the worksheet command, reports, the console) shows
these words as they are; none works a state out for itself.
"""

from __future__ import annotations

import enum


class FactorState(enum.StrEnum):
    """The state of one factor (the same rule for every factor)."""

    #: Computed from this session's measurements: the charge readings (k_pol, k_s) or the
    #: thermometer and barometer readings (k_TP), whether typed in or sent by a sensor.
    MEASURED = "measured"
    #: The factor's own value typed in from a certificate or the code of practice (k_elec,
    #: N_D,w, k_Q).
    ENTERED = "entered"
    #: No measurement or entry gives the value: the protocols' conventional value is used and
    #: the factor's source says why (k_h = 1; k_elec = 1 when none is entered).
    DEFAULT = "default"
    #: k_pol or k_s of a routine output check, which takes no opposite-polarity or reduced-bias
    #: readings: the value measured in an earlier full calibration (or entered from a
    #: calibration report), shown with its source and date (:mod:`chargebook.corrections.carried`);
    #: its uncertainty enters the budget as Type B.
    CARRIED = "carried"
    #: Not known yet: every value depending on it is None, never computed as if it were 1.
    PENDING = "pending"


#: Every state, in the order above.
STATES: tuple[str, ...] = tuple(state.value for state in FactorState)
