"""Carried factors: k_pol and k_s taken from an earlier full calibration for an output check.

A routine output check (daily, monthly) takes readings at the routine polarity and bias only.
Its k_pol and k_s are *carried*: the values measured in the beam's last full calibration with
the same chamber and electrometer, or values entered from a calibration report. A carried
factor keeps where it came from (``source``), the date it was determined (``date``) and, when
known, its standard uncertainty (``u_pct``), which enters the budget as a Type B component.

Pure: no clock. The date a factor is checked against (``on``, the measurement's date) is given
by the caller; a factor dated after it is refused, and one older than the threshold
``carried_max_age_days`` is flagged (:func:`age_flags`).
"""

from __future__ import annotations

import dataclasses
import datetime
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from chargebook.corrections import limits
from chargebook.corrections.errors import Flag, InputError

#: The factors that may be carried (the ones a routine-only session cannot measure).
CARRIED_KEYS: tuple[str, ...] = ("k_pol", "k_s")
#: The reading set (and plan purpose) whose readings measure each factor that may be carried.
MEASURED_BY: dict[str, str] = {"k_pol": "opposite", "k_s": "reduced"}
#: The keys of one carried factor's table, required first.
REQUIRED_KEYS: tuple[str, ...] = ("value", "source", "date")
OPTIONAL_KEYS: tuple[str, ...] = ("u_pct", "u_source")
MAX_SOURCE = 200
DATE_WORDS = "a date written YYYY-MM-DD"


@dataclass(frozen=True)
class CarriedFactor:
    """One carried factor: value (dimensionless), where it came from, its date (YYYY-MM-DD),
    its standard uncertainty in % (None: not known) and where that uncertainty came from."""

    value: float
    source: str
    date: str
    u_pct: float | None = None
    u_source: str = ""

    def to_dict(self) -> dict[str, Any]:
        """Return the plain values (keys value, source, date, u_pct, u_source)."""
        return dataclasses.asdict(self)

    def age_days(self, on: str) -> int:
        """Return the days from the factor's date to ``on`` (YYYY-MM-DD)."""
        return (parse_date("date", on) - parse_date("date", self.date)).days


def parse_date(field: str, value: object) -> datetime.date:
    """Return the date written YYYY-MM-DD (or a date object); InputError naming ``field``."""
    if isinstance(value, datetime.date) and not isinstance(value, datetime.datetime):
        return value
    if not isinstance(value, str):
        raise InputError(field, value, DATE_WORDS, "is not a date")
    try:
        return datetime.date.fromisoformat(value.strip())
    except ValueError:
        raise InputError(field, value, DATE_WORDS, "is not a date") from None


def checked_text(field: str, value: object, longest: int, allowed: str = "") -> str:
    """Return ``value`` stripped; InputError naming ``field`` unless a text of 1 to ``longest``
    characters (``allowed`` says what is allowed, by default in those words)."""
    allowed = allowed or f"a text of 1 to {longest} characters"
    if not isinstance(value, str):
        raise InputError(field, value, allowed, "is not text")
    text = value.strip()
    if not text:
        raise InputError(field, value, allowed, "is empty")
    if len(text) > longest:
        raise InputError(field, f"{text[:20]}…", allowed, f"has {len(text)} characters")
    return text


def _source(field: str, value: object) -> str:
    allowed = f"a text of 1 to {MAX_SOURCE} characters saying where the value came from"
    return checked_text(field, value, MAX_SOURCE, allowed)


def carried_factor(field: str, data: object, on: str | None = None) -> CarriedFactor:
    """Return the checked carried factor in the table ``data``; InputError naming the key.

    ``field`` names the table in messages (``carried.k_pol``, ``carried_k_s``). ``value`` is
    checked against the plausible range of a correction factor (0.5 to 1.5), ``u_pct``
    against 0 to 50 %. ``on`` (YYYY-MM-DD): the measurement's date; a factor dated after it
    is refused as a date in the future.
    """
    if not isinstance(data, Mapping):
        keys = ", ".join(REQUIRED_KEYS + OPTIONAL_KEYS)
        raise InputError(field, data, f"a table with {keys}", "is not a table")
    for key in data:
        if key not in REQUIRED_KEYS + OPTIONAL_KEYS:
            known = ", ".join(REQUIRED_KEYS + OPTIONAL_KEYS)
            raise InputError(f"{field}.{key}", data[key], known, "is not a known key")
    for key in REQUIRED_KEYS:
        if data.get(key) is None:
            raise InputError(f"{field}.{key}", None, _required_words(key), "is missing")
    value = float(limits.CORRECTION_FACTOR.check(f"{field}.value", data["value"]))
    date = parse_date(f"{field}.date", data["date"])
    if on is not None and date > parse_date("measurement date", on):
        raise InputError(
            f"{field}.date",
            date.isoformat(),
            f"a date on or before the measurement ({on})",
            "is in the future",
        )
    u_pct = data.get("u_pct")
    if u_pct is not None:
        u_pct = float(limits.UNCERTAINTY_PCT.check(f"{field}.u_pct", u_pct))
    u_source = data.get("u_source") or None
    if u_source is None:
        u_source = "" if u_pct is None else "entered"
    else:
        u_source = _source(f"{field}.u_source", u_source)
    return CarriedFactor(
        value, _source(f"{field}.source", data["source"]), date.isoformat(), u_pct, u_source
    )


def _required_words(key: str) -> str:
    return {
        "value": f"the factor's value, {limits.CORRECTION_FACTOR.text()}",
        "source": "where the value came from (a session, a calibration report)",
        "date": f"the date the factor was determined, {DATE_WORDS}",
    }[key]


def state_source(factor: CarriedFactor) -> str:
    """Return the words shown beside a carried factor: its source and date."""
    return f"carried: {factor.source}, dated {factor.date}"


def not_measured_flag(key: str, symbol: str, set_name: str) -> Flag:
    """Return the warning for a factor the measurement does not measure and nobody carried."""
    return Flag(
        f"{key}_not_measured",
        f"{symbol} is pending: this measurement takes no {set_name} readings and no {symbol} "
        "was carried, so the dose is pending too. For an output check, carry it from the "
        f"beam's full calibration (a worksheet's [carried] table; a session's carried_{key}, "
        "or a finished full calibration of the beam with the same chamber and electrometer).",
    )


def age_flags(
    key: str, symbol: str, factor: CarriedFactor, on: str | None, max_age_days: float
) -> list[Flag]:
    """Return a warning when the carried factor is older than ``max_age_days`` on ``on``."""
    if on is None:
        return []
    age = factor.age_days(on)
    if age <= max_age_days:
        return []
    return [
        Flag(
            f"{key}_carried_old",
            f"The carried {symbol} = {factor.value:.5f} is dated {factor.date}, {age} days before "
            f"this measurement (more than {max_age_days:g}): measure it again in a full "
            "calibration before relying on this output check.",
        )
    ]
