"""Turning one received line into a Sample, an Identity, or a typed error: the line parser.

Every function here takes the raw bytes of one line (terminator removed) and either returns a
value or raises :class:`ProtocolError` carrying those bytes, so the caller can record the rejected
line. Nothing else escapes: not UnicodeDecodeError, not ValueError, not OverflowError. Numbers are
read strictly: ``nan``, ``inf``, underscores, non-ASCII digits and values that overflow to
infinity are refused, never clamped.
"""

from __future__ import annotations

import math
import re

from chargebook.drivers_generic.interface import Identity, ProtocolError, ReadingStatus, Sample
from chargebook.drivers_generic.profile import CHARGE_UNITS_IN_nC, IdentityFormat, ReadingFormat

_MANTISSA = r"[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)"
NUMBER_SHAPES = {
    "plain": re.compile(_MANTISSA, re.ASCII),
    "exponent": re.compile(_MANTISSA + r"(?:[eE][+-]?[0-9]{1,4})?", re.ASCII),
    "engineering": re.compile(f"(?P<mantissa>{_MANTISSA})(?P<suffix>[fpnumk]?)", re.ASCII),
}

#: Engineering suffixes and the power of ten each stands for.
ENGINEERING_SUFFIXES: dict[str, float] = {
    "f": 1e-15,
    "p": 1e-12,
    "n": 1e-9,
    "u": 1e-6,
    "m": 1e-3,
    "": 1.0,
    "k": 1e3,
}

_END_OF_LINE = "\r\n"


def decode_line(raw: bytes, encoding: str) -> str:
    """Return the line as text in the profile's encoding, or raise ProtocolError if it is not."""
    try:
        text = raw.decode(encoding)
    except UnicodeDecodeError as error:
        raise ProtocolError(f"line is not valid {encoding}: {error.reason}", raw) from None
    return text.rstrip(_END_OF_LINE)


def parse_number(text: str, number_format: str, raw: bytes = b"") -> float:
    """Return the finite number written in ``text`` (plain, exponent, or engineering suffix)."""
    match = NUMBER_SHAPES[number_format].fullmatch(text)
    if match is None:
        raise ProtocolError(f"{text!r} is not a {number_format} number", raw)
    if number_format == "engineering":
        value = float(match["mantissa"]) * ENGINEERING_SUFFIXES[match["suffix"]]
    else:
        value = float(text)
    if not math.isfinite(value):
        raise ProtocolError(f"{text!r} is not a finite number", raw)
    return value


def parse_reading(fmt: ReadingFormat, raw: bytes, t_s: float, encoding: str = "ascii") -> Sample:
    """Return the Sample (charge in nC, status, complete flag) that one reading line holds."""
    text = decode_line(raw, encoding)
    match = fmt.pattern.fullmatch(text)
    if match is None:
        raise ProtocolError(f"line does not match the reading pattern: {text[:80]!r}", raw)
    groups = fmt.pattern.groupindex  # read group by group: no dict of every group per line
    value = parse_number(match["value"], fmt.number_format, raw)
    unit = ("unit" in groups and match["unit"]) or fmt.unit
    scale = CHARGE_UNITS_IN_nC.get(unit)
    if scale is None:
        raise ProtocolError(f"unknown charge unit {unit!r}", raw)
    charge_nC = value * scale
    if not math.isfinite(charge_nC):
        raise ProtocolError(f"charge {value!r} {unit} is not finite in nC", raw)
    status = _status(fmt, match["status"], raw) if "status" in groups else ReadingStatus.OK
    if fmt.overrange_abs is not None and abs(value) >= fmt.overrange_abs:
        status = ReadingStatus.OVERRANGE
    complete = False
    if fmt.complete_group is not None:
        complete = match[fmt.complete_group] == fmt.complete_value
    return Sample(t_s, charge_nC, status, complete, text)


def _status(fmt: ReadingFormat, word: str | None, raw: bytes) -> ReadingStatus:
    if word is None:  # an optional status field left out
        return ReadingStatus.OK
    try:
        return fmt.status_map[word]
    except KeyError:
        known = ", ".join(fmt.status_map)
        raise ProtocolError(f"unknown status {word!r}; the profile knows {known}", raw) from None


def parse_identity(fmt: IdentityFormat, raw: bytes, encoding: str = "ascii") -> Identity:
    """Return the Identity (manufacturer, model, serial, firmware) in an identity reply line."""
    text = decode_line(raw, encoding)
    match = fmt.pattern.fullmatch(text)
    if match is None:
        raise ProtocolError(f"line does not match the identity pattern: {text[:80]!r}", raw)
    return Identity(
        manufacturer=match["manufacturer"].strip(),
        model=match["model"].strip(),
        serial=match["serial"].strip(),
        firmware=match["firmware"].strip(),
        raw=text,
    )


def lenient_text(raw: bytes) -> str:
    """Return the line decoded for display, undecodable bytes replaced."""
    return raw.decode("utf-8", errors="replace").rstrip(_END_OF_LINE)
