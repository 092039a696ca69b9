"""Plain-words text for the console: numbers as the daemon computed them, flags, states, steps.

The console formats; it never computes physics. Every function here turns a value from the
daemon's snapshot into a short string. A missing value (``None``) is shown as "pending", never
as 0 or 1. Flags always carry a text marker ("!!", "!", "i") so that meaning never rests on
colour alone.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from datetime import UTC, datetime
from typing import Any

from chargebook.acquire import protocol
from rich.text import Text

PENDING = "pending"
MINUS = "\u2212"
#: A space that never breaks a line, kept between a number and its unit.
NBSP = "\u00a0"

#: Marker put before a flag's message, by severity: readable without colour.
SEVERITY_MARKERS = protocol.SEVERITY_MARKERS
OK_MARKER = "ok"

PURPOSE_WORDS: dict[str, str] = {
    "leakage": "Leakage check",
    "warmup": "Warm-up",
    "routine": "Routine polarity",
    "opposite": "Opposite polarity",
    "reduced": "Reduced bias",
    "return_check": "Return-to-start check",
}

CONVENTION_WORDS: dict[str, str] = {"trs398": "IAEA TRS-398", "tg51": "AAPM TG-51"}

STATE_WORDS: dict[str, str] = {
    "idle": "no session open",
    "waiting_for_operator": "waiting for you",
    "settling": "settling",
    "collecting": "taking readings",
    "reviewing": "set complete: review it",
    "paused": "paused",
    "interrupted": "interrupted",
    "finished": "finished",
    "aborted": "aborted",
}

PHASE_WORDS: dict[str, str] = {
    "idle": "not integrating",
    "armed": "armed, waiting for beam",
    "rising": "beam on, charge rising",
    "holding": "charge holding, ending the reading",
    "timed": "integrating for a fixed time",
}

SET_STATUS_WORDS: dict[str, str] = {
    "collecting": "taking readings",
    "reviewing": "to review",
    "accepted": "accepted",
    "superseded": "superseded",
    "interrupted": "interrupted",
    "aborted": "aborted",
}


def signed(value: float, digits: int) -> str:
    """Return ``value`` with ``digits`` decimals and a true minus sign (U+2212)."""
    text = f"{value:.{digits}f}"
    return MINUS + text[1:] if text.startswith("-") else text


def number(value: float | None, digits: int, unit: str = "") -> str:
    """Return ``value`` rounded to ``digits`` decimals with its unit, or "pending" if None."""
    if value is None:
        return PENDING
    text = signed(value, digits)
    return f"{text}{NBSP}{unit}" if unit else text


def local_time(iso: str | None) -> str:
    """Return a stored UTC time as local time with its offset: "2026-12-02 07:38:17 +01:00".

    Text that is not an ISO 8601 time is returned as it is (never an error on screen).
    """
    if not iso:
        return ""
    try:
        moment = datetime.fromisoformat(iso)
    except ValueError:
        return iso
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    local = moment.astimezone()
    offset = local.strftime("%z")
    return f"{local:%Y-%m-%d %H:%M:%S} {offset[:3]}:{offset[3:]}"


def charge_nC(value: float | None) -> str:
    """Return a charge in nC with four decimals (e.g. "20.0312 nC"), or "pending"."""
    return number(value, 4, "nC")


def percent(value: float | None, digits: int = 2) -> str:
    """Return a percentage with its sign where negative (e.g. "0.05 %"), or "pending"."""
    return number(value, digits, "%")


def deviation_pct(value: float | None) -> str:
    """Return a deviation in % with an explicit sign ("+0.42 %", "−1.10 %"), or "pending"."""
    if value is None:
        return PENDING
    text = signed(value, 2)
    return f"{'+' if value >= 0 else ''}{text}{NBSP}%"


def bias_V(value: float | None) -> str:
    """Return a bias voltage with its sign ("+300 V", "−100 V"), or "pending"."""
    if value is None:
        return PENDING
    text = signed(value, 0)
    return f"{'+' if value > 0 else ''}{text}{NBSP}V"


def purpose(name: str) -> str:
    """Return a plan step's purpose in words ("Opposite polarity")."""
    return PURPOSE_WORDS.get(name, name.replace("_", " ").capitalize())


def convention(name: str) -> str:
    """Return a code of practice's title ("IAEA TRS-398") from its key ("trs398")."""
    return CONVENTION_WORDS.get(name, name)


def state(name: str) -> str:
    """Return an engine state in words ("taking readings")."""
    return STATE_WORDS.get(name, name.replace("_", " "))


def phase(name: str | None) -> str:
    """Return a reading phase in words ("beam on, charge rising")."""
    if not name:
        return PHASE_WORDS["idle"]
    return PHASE_WORDS.get(name, name.replace("_", " "))


def set_status(name: str) -> str:
    """Return a reading set's status in words ("superseded")."""
    return SET_STATUS_WORDS.get(name, name.replace("_", " "))


def flag(flag_info: Mapping[str, Any]) -> str:
    """Return a flag as one line: its text marker then its message ("! relative SD ...")."""
    marker = SEVERITY_MARKERS.get(str(flag_info.get("severity", "warning")), "!")
    return f"{marker} {flag_info.get('message', flag_info.get('code', ''))}"


def flags_or_ok(flags: Iterable[Mapping[str, Any]], ok_text: str = "no flags") -> list[str]:
    """Return one line per flag, or a single "ok" line when there are none."""
    lines = [flag(item) for item in protocol.by_severity(list(flags))]
    return lines or [f"{OK_MARKER} {ok_text}"]


def reading_marker(flags: Iterable[Mapping[str, Any]], settling: bool) -> str:
    """Return the short marker of one reading: "settling", the worst flag's marker, or "ok"."""
    if settling:
        return "settling"
    markers = [SEVERITY_MARKERS.get(str(item.get("severity")), "!") for item in flags]
    for marker in ("!!", "!", "i"):
        if marker in markers:
            return marker
    return OK_MARKER


def plain(value: object) -> Text:
    """Return ``value`` as text shown exactly as written (brackets are not markup)."""
    return Text(str(value))


def plain_row(values: Iterable[object]) -> list[Text]:
    """Return a table row whose cells show exactly what they hold."""
    return [plain(value) for value in values]


#: Full scale of the readings' bar line: ± this percentage of the set's mean.
BAR_SCALE_PCT = 0.1
_BARS = "▁▂▃▄▅▆▇█"


def deviation_bars(charges_nC: Iterable[float], mean_nC: float | None) -> str:
    """Return one bar per reading for its deviation from ``mean_nC`` on a stated scale.

    The lowest bar is −0.1 % of the mean or below, the highest +0.1 % or above (▼ and ▲ mark a
    reading beyond the scale), so two readings 0.05 % apart draw bars four steps apart, never a
    full and an empty bar. The scale follows the sign of the charge: higher means larger in
    magnitude. Returns "" without a mean.
    """
    if not mean_nC:
        return ""
    bars = []
    for charge in charges_nC:
        deviation_pct = 100.0 * (charge / mean_nC - 1.0)
        if deviation_pct > BAR_SCALE_PCT:
            bars.append("▲")
        elif deviation_pct < -BAR_SCALE_PCT:
            bars.append("▼")
        else:
            level = (deviation_pct + BAR_SCALE_PCT) / (2 * BAR_SCALE_PCT) * (len(_BARS) - 1)
            bars.append(_BARS[round(level)])
    return " ".join(bars)


def bar_scale_caption() -> str:
    """Return the caption that states the bar line's scale (▲ and ▼: beyond it)."""
    return f"{_BARS[0]} −{BAR_SCALE_PCT:g} % to {_BARS[-1]} +{BAR_SCALE_PCT:g} % of the mean"
