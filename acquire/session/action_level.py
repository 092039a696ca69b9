"""A session's action level, read from its metadata.

Light to import (no physics, no numpy): ``history`` draws the action level over years of
sessions whose results are kept in the record.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

#: Metadata key of an action level (%), wider than the tolerance, when one is typed.
ACTION_LEVEL_KEY = "action_level_pct"


def action_level_pct(metadata: Mapping[str, Any]) -> float | None:
    """Return a session's action level, % (± about the expected output), or None if not set.

    The one place every output reads it from: the metadata's ``action_level_pct`` when typed,
    else the ``action_pct`` of the beam's register row as copied into the session when it began.
    """
    typed = metadata.get(ACTION_LEVEL_KEY)
    if typed is not None:
        return float(typed)
    beam = (metadata.get("register_copy") or {}).get("beam") or {}
    registered = (beam.get("fields") or {}).get("action_pct")
    return None if registered is None else float(registered)
