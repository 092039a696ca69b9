"""Turning a burst of pushed reading lines into Samples in one pass over the burst.

An instrument that streams sends thousands of lines a second, nearly all of them well-formed
readings of one shape. :class:`BurstParser` reads such a burst (the complete lines one read
brought, terminators included) with one compiled regular expression over the whole of it, and
checks, converts and scales the values column by column: its Samples are exactly those
:func:`~chargebook.drivers_generic.lines.parse_reading` gives line by line. Whenever the burst
is not plainly a run of good readings (a line that does not match, a stray confirmation, a
number out of shape, an unknown unit or status word, an overrange value, a stray carriage
return, an engineering suffix), it answers None and the caller parses line by line, so every
rejected line still gets its own ProtocolError.
"""

from __future__ import annotations

import codecs
import math
import re
from itertools import repeat
from operator import itemgetter

from chargebook.drivers_generic.interface import ReadingStatus, Sample
from chargebook.drivers_generic.lines import NUMBER_SHAPES
from chargebook.drivers_generic.profile import CHARGE_UNITS_IN_nC, Framing, ReadingFormat

#: The characters the per-line parser strips from a line's end; a burst is read at once only
#: when its terminators hold all of them, so no line is stripped differently.
_LINE_ENDS = "\r\n"
#: Encodings in which a line's bytes decode the same alone as within the burst.
_ENCODINGS = ("ascii", "utf-8", "iso8859-1")
#: Pattern syntax that wrapping the pattern in a group would change (numbered references).
_NUMBERED = re.compile(r"\\[1-9]|\(\?\(")
_TEXT = itemgetter(0)


class BurstParser:
    """Reads a burst of pushed lines of one profile at once (see the module docstring)."""

    def __init__(self, fmt: ReadingFormat, framing: Framing, ack: re.Pattern[str] | None) -> None:
        self.fmt = fmt
        self.encoding = framing.encoding
        end = framing.read_terminator.decode("latin-1")
        groups = fmt.pattern.groupindex
        shape = NUMBER_SHAPES.get(fmt.number_format)
        usable = (
            fmt.number_format in ("plain", "exponent")
            and shape is not None
            and "value" in groups
            and codecs.lookup(framing.encoding).name in _ENCODINGS
            and end != ""
            and not end.strip(_LINE_ENDS)
            and _NUMBERED.search(fmt.pattern.pattern) is None
            and (fmt.complete_group is None or bool(fmt.complete_value))
        )
        self.end_chars = sum(end.count(c) for c in _LINE_ENDS)
        self.end_length = len(end)
        #: The reading pattern as one group, then the terminator: a match's first group is
        #: a line's text, and each of the pattern's groups comes one place later.
        self._line = (
            re.compile(f"((?:{fmt.pattern.pattern})){re.escape(end)}", fmt.pattern.flags)
            if usable
            else None
        )
        #: Every value of a burst, one a line: the number shape, repeated.
        self._numbers = (
            None
            if shape is None or not usable
            else re.compile(f"(?:{shape.pattern})(?:\n(?:{shape.pattern}))*", shape.flags)
        )
        #: A line that is a confirmation (a late ack) sends the burst line by line: ``_ack``
        #: finds the bursts that may hold one (a quick search), ``ack`` tells for sure.
        self.ack = ack
        self._ack = (
            None if ack is None else re.compile(f"(?:{ack.pattern})(?={re.escape(end)})", ack.flags)
        )

        def group(name: str | None) -> itemgetter | None:
            return itemgetter(groups[name]) if name in groups else None

        self._value = group("value")
        self._unit = group("unit")
        self._status = group("status")
        self._kind = group(fmt.complete_group)

    def parse(self, data: bytes, count: int, t_s: float) -> list[Sample] | None:
        """Return the Samples of the ``count`` lines in ``data`` (each with its terminator),
        received at ``t_s``; None when the burst must be parsed line by line."""
        if self._line is None or self._numbers is None or self._value is None:
            return None
        try:
            text = data.decode(self.encoding)
        except UnicodeDecodeError:
            return None
        if text.count("\r") + text.count("\n") != count * self.end_chars:
            return None  # a carriage return or line feed inside a line
        found = self._line.findall(text)
        texts = list(map(_TEXT, found))
        # non-overlapping matches, each ending with a terminator, as many as the lines and as
        # long as the text all together: each match is exactly one line
        if len(found) != count or sum(map(len, texts)) + count * self.end_length != len(text):
            return None
        if self._ack is not None and self._ack.search(text) is not None:
            assert self.ack is not None
            if any(map(self.ack.fullmatch, texts)):
                return None
        values = list(map(self._value, found))
        if self._numbers.fullmatch("\n".join(values)) is None:
            return None
        return self._samples(found, list(map(float, values)), texts, t_s)

    def _samples(
        self, found: list[tuple[str, ...]], numbers: list[float], texts: list[str], t_s: float
    ) -> list[Sample] | None:
        """Return the Samples of lines whose values are known good (None: line by line)."""
        fmt = self.fmt
        units = {fmt.unit} if self._unit is None else set(map(self._unit, found))
        units = {unit or fmt.unit for unit in units}
        scale = CHARGE_UNITS_IN_nC.get(units.pop()) if len(units) == 1 else None
        if scale is None:
            return None
        charges = [value * scale for value in numbers]
        if not all(map(math.isfinite, charges)):
            return None
        if fmt.overrange_abs is not None and max(map(abs, numbers)) >= fmt.overrange_abs:
            return None
        statuses: list[ReadingStatus] | repeat[ReadingStatus] = repeat(ReadingStatus.OK)
        if self._status is not None:
            try:
                statuses = list(map(fmt.status_map.__getitem__, map(self._status, found)))
            except KeyError:
                return None
        complete: list[bool] | repeat[bool] = repeat(False)
        if self._kind is not None:
            complete = list(map(fmt.complete_value.__eq__, map(self._kind, found)))
        # tuple.__new__ straight from C: Sample._make is a Python call per line
        rows = zip(repeat(t_s), charges, statuses, complete, texts)
        return list(map(tuple.__new__, repeat(Sample), rows))
