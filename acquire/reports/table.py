"""A titled table of formatted cells and the formatting of its numbers and times: light to
import (no physics), so that a listing command starts quickly."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

PENDING = "pending"
NOT_GIVEN = "—"


@dataclass(frozen=True)
class Table:
    """A titled table of formatted cells; ``keys`` names each row for machine readers."""

    title: str
    headers: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    keys: tuple[str, ...] = ()
    note: str = ""
    extra: dict[str, Any] = field(default_factory=dict)


def number(value: float | None, digits: int, missing: str = PENDING) -> str:
    """Return ``value`` with ``digits`` decimals, or ``missing`` when it is None."""
    return missing if value is None else f"{value:.{digits}f}"


def signed(value: float | None, digits: int, missing: str = PENDING) -> str:
    """Return ``value`` with a sign and ``digits`` decimals, or ``missing`` when None."""
    return missing if value is None else f"{value:+.{digits}f}"


def when(stamp: str | None) -> str:
    """Return a stored UTC ISO time as 'YYYY-MM-DD HH:MM:SS UTC' ('—' when None)."""
    if not stamp:
        return NOT_GIVEN
    return stamp[:19].replace("T", " ") + " UTC"
