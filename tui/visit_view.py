"""A calibration visit as the console shows it: the beams in order, and the air data's age.

Pure text from the daemon's snapshot (its ``visit``, as ``acquire/session/visit_summary.py``
builds it, and its ``environment``); the numbers are the daemon's, formatted here. Only the age
of the air data is counted here, from their reading time and the console's clock, so that it
grows while the screen stands still.
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import UTC, datetime
from typing import Any

from chargebook.tui import text

#: The flag shown, by name, when the air data in force were read longer ago than the visit's
#: ``air_max_age_min``.
AIR_OLD_FLAG = "air_entry_old"
#: What an environment source says when the values were confirmed, not read (the daemon's).
CONFIRMED = "confirmed"


def beam_line(beam: Mapping[str, Any]) -> str:
    """Return one beam of the visit: place, name, plan, status (and why), and its result."""
    status = str(beam.get("status"))
    if beam.get("reason"):
        status += f" ({beam['reason']})"
    line = f"{beam.get('position')}. {beam.get('name')} · {beam.get('plan')} · {status}"
    if beam.get("dose_per_MU_cGy") is not None:
        verdict = str(beam.get("verdict", "")).upper()
        line += (
            f" · {text.number(beam['dose_per_MU_cGy'], 4, 'cGy/MU')}"
            f" {text.deviation_pct(beam.get('deviation_pct'))} {verdict}"
        )
    flags = beam.get("flags") or []
    if flags:
        line += f" · {len(flags)} flag(s)"
    return line


def visit_lines(snapshot: Mapping[str, Any] | None) -> list[str]:
    """Return the visit's title and its beams, one line each (empty outside a visit)."""
    visit = (snapshot or {}).get("visit")
    if not visit:
        return []
    title = f"Visit {visit.get('id')} at {visit.get('machine')} ({visit.get('status')})"
    review = visit.get("review")
    if review:
        title += f", {review.get('status')} by {review.get('reviewer')}"
    beams = [beam_line(beam) for beam in visit.get("beams") or []]
    return [title, *(beams or ["no beam yet: fill in the form and press Ctrl+S to measure one"])]


def next_planned(snapshot: Mapping[str, Any] | None) -> Mapping[str, Any] | None:
    """Return the first beam of the visit not measured yet (planned), or None."""
    visit = (snapshot or {}).get("visit") or {}
    return next((b for b in visit.get("beams") or [] if b.get("status") == "planned"), None)


def age_min(stamp: str, now: datetime) -> float | None:
    """Return the minutes from ``stamp`` (ISO 8601) to ``now``, or None for no stamp."""
    try:
        moment = datetime.fromisoformat(stamp)
    except (TypeError, ValueError):
        return None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return (now - moment).total_seconds() / 60.0


def air_line(snapshot: Mapping[str, Any] | None, now: datetime) -> str:
    """Return the air entry in force, its source and its age: counted from when the values
    were read (a confirmed entry carries the reading time of the values it confirms). In a
    visit, an age past its ``air_max_age_min`` is flagged by name (:data:`AIR_OLD_FLAG`)."""
    snapshot = snapshot or {}
    entry = snapshot.get("environment")
    if not entry:
        return "Air: not entered yet"
    visit = snapshot.get("visit") or {}
    read_at = entry.get("recorded_at")
    if str(entry.get("source", "")).startswith(CONFIRMED) and visit.get("air"):
        read_at = visit["air"].get("read_at")
    age = age_min(str(read_at), now)
    shown = (
        f"Air: {text.number(entry.get('temperature_C'), 1, '°C')}, "
        f"{text.number(entry.get('pressure_kPa'), 3, 'kPa')} · {entry.get('source')} · read "
        f"{text.local_time(read_at)}"
    )
    if age is not None:
        shown += f", {age:.0f} min ago"
    limit = (visit.get("metadata") or {}).get("air_max_age_min")
    if visit.get("status") == "open" and age is not None and limit is not None and age > limit:
        shown += (
            f"\n!! {AIR_OLD_FLAG}: the air data were read {age:.0f} min ago, more than the "
            f"{limit:g} min set for this visit: read the thermometer and barometer again "
            "(E: new temperature and pressure)"
        )
    return shown
