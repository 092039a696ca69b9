"""The rules of a calibration visit that need no record: its metadata, and the air carried over.

Air temperature and pressure are carried from one beam of a visit to the next only when the
operator confirms them (``visit.confirm_air``) or enters new values. A confirmation is an
environment entry of its own whose source starts with :data:`CONFIRMED` and names when the
values were last read; the age of the air data is counted from that reading, never from the
confirmation. Past the visit's ``air_max_age_min`` (default 30 min, common practice: room air
and the barometer drift over a sitting) a confirmation is refused, naming the setting, and the
values must be read again.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from datetime import datetime
from typing import Any

from chargebook.acquire.record.store import EnvironmentRow
from chargebook.corrections.errors import InputError

#: How old (min) carried air data may be when confirmed; common practice.
DEFAULT_AIR_MAX_AGE_MIN = 30.0
#: The range a visit may set for it, in minutes.
AIR_MAX_AGE_RANGE_MIN = (1.0, 240.0)
#: How the source of a confirmed (carried) environment entry begins.
CONFIRMED = "confirmed"
#: What a visit's metadata may hold, besides the machine.
VISIT_KEYS = ("operator", "air_max_age_min", "register_ids", "notes")


def validate_visit_metadata(metadata: Mapping[str, Any]) -> dict[str, Any]:
    """Return the visit's metadata checked: ``operator`` (required), ``air_max_age_min``
    (minutes, default 30), ``register_ids`` (optional: register name -> row id, for the
    station registers), ``notes``. Raises InputError naming the field."""
    if not isinstance(metadata, Mapping):
        raise InputError("metadata", metadata, "a table of the visit's details", "is not one")
    unknown = sorted(set(metadata) - set(VISIT_KEYS))
    if unknown:
        raise InputError(unknown[0], metadata[unknown[0]], ", ".join(VISIT_KEYS), "is not known")
    operator = metadata.get("operator")
    if not isinstance(operator, str) or not operator.strip():
        raise InputError("operator", operator, "the name of the operator", "is empty")
    age = metadata.get("air_max_age_min", DEFAULT_AIR_MAX_AGE_MIN)
    low, high = AIR_MAX_AGE_RANGE_MIN
    if (
        isinstance(age, bool)
        or not isinstance(age, int | float)
        or not math.isfinite(age)
        or not low <= age <= high
    ):
        raise InputError("air_max_age_min", age, f"{low:g} to {high:g} min", "is out of range")
    checked: dict[str, Any] = {
        "operator": " ".join(operator.split()),
        "air_max_age_min": float(age),
        "register_ids": check_register_ids(metadata.get("register_ids")),
    }
    if metadata.get("notes"):
        checked["notes"] = str(metadata["notes"])
    return checked


def check_register_ids(registers: object) -> dict[str, int]:
    """Return register row ids checked (register name -> row id; None: none). The station
    registers of machines and beams, chambers and electrometers are not built yet: this is
    where their row ids go. Raises InputError naming ``register_ids``."""
    registers = registers or {}
    if not isinstance(registers, Mapping) or not all(
        isinstance(key, str) and isinstance(value, int) and not isinstance(value, bool)
        for key, value in registers.items()
    ):
        raise InputError(
            "register_ids", registers, "register name -> row id (an integer)", "is not one"
        )
    return dict(registers)


def beam_metadata(machine: str, metadata: Mapping[str, Any]) -> dict[str, Any]:
    """Return a beam's session metadata with the visit's machine, refusing another machine
    by name (a visit is one sitting at one treatment machine)."""
    if not isinstance(metadata, Mapping):
        raise InputError("metadata", metadata, "a table of the beam's details", "is not one")
    given = metadata.get("treatment_machine")
    if given not in (None, "") and " ".join(str(given).split()) != machine:
        raise InputError(
            "treatment_machine", given, f"{machine}, the machine of this visit", "is another"
        )
    return {**metadata, "treatment_machine": machine}


def last_read(entries: Sequence[EnvironmentRow]) -> EnvironmentRow | None:
    """Return the newest entry whose values were read (not confirmed), or None."""
    read = [entry for entry in entries if not entry.source.startswith(CONFIRMED)]
    return max(read, key=lambda entry: entry.recorded_at) if read else None


def age_min(read_at: str, now: str) -> float:
    """Return the minutes from ``read_at`` to ``now`` (two ISO 8601 stamps with offsets)."""
    return (datetime.fromisoformat(now) - datetime.fromisoformat(read_at)).total_seconds() / 60.0


def confirmed_source(read: EnvironmentRow, age: float, session_id: int) -> str:
    """Return the source of a confirmed entry: whence and when the values were read."""
    return (
        f"{CONFIRMED}: read at {read.recorded_at} in session {session_id} "
        f"({read.source}), {age:.0f} min before, confirmed by the operator"
    )


def refuse_old_air(age: float, max_age_min: float, read_at: str) -> None:
    """Raise InputError (naming ``air_max_age_min``) when air data read ``age`` minutes ago
    are too old to be confirmed."""
    if age > max_age_min:
        raise InputError(
            "air_max_age_min",
            round(age, 1),
            f"air data read at most {max_age_min:g} min before they are confirmed",
            f"is exceeded: the temperature and pressure were read at {read_at}, "
            f"{age:.0f} min ago; read the thermometer and barometer again",
        )
