"""What kind of session a stored plan makes: a full calibration or an output check.

Light to import (no physics, no numpy): ``history`` names the kind of each of thousands of
sessions whose results are kept in the record, and computes nothing for them.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

FULL_CALIBRATION = "full calibration"
OUTPUT_CHECK = "output check"


def session_kind(plan: Mapping[str, Any]) -> str:
    """Return "full calibration" when a stored plan measures k_pol and k_s, else "output check"."""
    purposes = {step.get("purpose") for step in plan.get("steps", ())}
    return FULL_CALIBRATION if {"opposite", "reduced"} <= purposes else OUTPUT_CHECK
