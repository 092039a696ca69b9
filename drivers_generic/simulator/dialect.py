"""The simulated instrument speaking a profile's serial dialect.

A :class:`DialectResponder` reads the same profile the driver does, from the other end: it
recognises each command by turning the command's template into a pattern, acts on the
:class:`SimulatedElectrometer`, and writes answers with the profile's ``format`` strings (reading
line, confirmation, refusal, identity). In push mode it also streams reading lines while
integrating and pushes a final reading line when a delivery ends.

Every responder offers ``respond(line) -> lines`` and ``tick() -> lines``, which is all a
server (pty or socket) needs; the playback responder offers the same.
"""

from __future__ import annotations

import math
import re
import string
from typing import Protocol

from chargebook.drivers_generic.interface import Capability
from chargebook.drivers_generic.profile import CHARGE_UNITS_IN_nC, CommandSpec, Profile
from chargebook.drivers_generic.simulator.device import (
    RANGES,
    SimulatedElectrometer,
    SimulatorInputError,
)

SIMULATOR_MANUFACTURER = "chargebook-sim"
SIMULATOR_FIRMWARE = "0.1.0"
DEFAULT_SERIAL_NUMBER = "SIM-EM-0001"

#: Error meanings the simulator may need to report, looked up in the profile's error table.
UNKNOWN_COMMAND = "unknown command"
OUT_OF_RANGE = "value out of range"

_ENGINEERING = (("p", 1e-12), ("n", 1e-9), ("u", 1e-6), ("m", 1e-3))


class Responder(Protocol):
    """What a simulated wire needs from the instrument behind it."""

    def respond(self, line: str) -> list[str]:
        """Return the lines the instrument writes in answer to one received line."""

    def tick(self) -> list[str]:
        """Return the lines the instrument writes unasked now (streaming, end of beam)."""

    def flood_line(self, index: int) -> str:
        """Return one reading line for a flood (benchmarks)."""


def template_pattern(template: str) -> re.Pattern[str]:
    """Return a pattern matching what ``template`` renders to, one named group per field."""
    parts = []
    for literal, field_name, _spec, _conversion in string.Formatter().parse(template):
        parts.append(re.escape(literal))
        if field_name:
            parts.append(f"(?P<{field_name}>\\S+)")
    return re.compile("".join(parts), re.ASCII)


def format_number(value: float, number_format: str, digits: int) -> str:
    """Return ``value`` written as plain, exponent or engineering (suffix p/n/u/m) text."""
    if number_format == "plain":
        return f"{value:+.{digits}f}"
    if number_format == "exponent":
        return f"{value:+.{digits}E}"
    magnitude = abs(value)
    suffix, scale = _ENGINEERING[0]
    for candidate, candidate_scale in _ENGINEERING:
        if magnitude >= candidate_scale:
            suffix, scale = candidate, candidate_scale
    return f"{value / scale:+.{digits}f}{suffix}"


class DialectResponder:
    """The simulated electrometer answering in the dialect of ``profile``."""

    def __init__(
        self,
        profile: Profile,
        device: SimulatedElectrometer,
        *,
        serial_number: str = DEFAULT_SERIAL_NUMBER,
        stream_period_s: float | None = None,
    ) -> None:
        self.profile = profile
        self.device = device
        self.serial_number = serial_number
        self.stream_period_s = (
            stream_period_s if stream_period_s is not None else max(0.1 * device.time_scale, 0.02)
        )
        self._commands = [
            (spec, index, template_pattern(template))
            for spec in profile.commands.values()
            for index, template in enumerate(spec.templates)
        ]
        self._status_words = {}
        for word, status in profile.reading.status_map.items():
            self._status_words.setdefault(status.value, word)
        self._error_codes = {
            meaning: code for code, meaning in profile.confirmation.error_messages.items()
        }
        self._last_stream_at = 0.0
        self._deliveries_seen = device.deliveries_completed
        self._started = device.clock()
        self._resets_itself = Capability.AUTO_RESET in profile.capabilities

    # -- answering commands -------------------------------------------------------------------
    def respond(self, line: str) -> list[str]:
        """Return the answer to one command line (a refusal if it is not a known command)."""
        for spec, index, pattern in self._commands:
            match = pattern.fullmatch(line)
            if match is not None:
                try:
                    return self._execute(spec, index, match.groupdict(), line)
                except SimulatorInputError:
                    return self._refusal(OUT_OF_RANGE)
        return self._refusal(UNKNOWN_COMMAND)

    def _execute(self, spec: CommandSpec, index: int, fields: dict[str, str], line: str):
        device = self.device
        name = spec.name
        if name == "identify":
            return [self._identity()]
        if name == "read":
            charge_nC, status = device.read()
            return [self.reading_line(charge_nC, status)]
        if name == "zero":
            device.zero()
        elif name == "start":
            device.start()
        elif name == "stop":
            device.stop()
        elif name == "set_bias":
            device.set_bias(_number(fields.get("volts")))
        elif name == "set_range":
            device.set_range(self._range_index(spec, fields.get("range")))
        return self._ack(line)

    def _range_index(self, spec: CommandSpec, word: str | None) -> int:
        rule = spec.arguments.get("range")
        choices = rule.choices if rule is not None else ()
        if word not in choices:
            raise SimulatorInputError("range", word, ", ".join(choices))
        return min(choices.index(word), len(RANGES) - 1)

    def _ack(self, line: str) -> list[str]:
        confirmation = self.profile.confirmation
        if confirmation.style != "ack":
            return []
        word = line.split(" ", 1)[0]
        return [confirmation.ack_format.format(command=word)]

    def _refusal(self, meaning: str) -> list[str]:
        confirmation = self.profile.confirmation
        if confirmation.style != "ack":
            return []
        code = self._error_codes.get(meaning, "1")
        return [confirmation.error_format.format(code=code, message=meaning)]

    def _identity(self) -> str:
        identity = self.profile.identity
        return identity.format.format(
            manufacturer=SIMULATOR_MANUFACTURER,
            model=self.profile.name.upper(),
            serial=self.serial_number,
            firmware=SIMULATOR_FIRMWARE,
        )

    # -- reading lines ------------------------------------------------------------------------
    def reading_line(self, charge_nC: float, status: str, *, final: bool = False) -> str:
        """Return a reading line in the profile's format (``final_format`` for end of beam)."""
        reading = self.profile.reading
        value = charge_nC / CHARGE_UNITS_IN_nC[reading.unit]
        if status == "overrange" and reading.overrange_abs is not None:
            value = math.copysign(reading.overrange_abs, value)
        text = format_number(value, reading.number_format, reading.digits)
        template = reading.final_format if final and reading.final_format else reading.format
        word = self._status_words.get(status, self._status_words.get("ok", ""))
        return template.format(value=text, status=word, t_s=self.device.clock() - self._started)

    def flood_line(self, index: int) -> str:
        """Return one reading line for a flood: the present charge, status as read."""
        charge_nC, status = self.device.read()
        return self._pushed(self.reading_line(charge_nC, status))

    def _pushed(self, line: str) -> str:
        """Return a reading line to push; an auto-reset instrument zeroes its integrator once
        it has pushed a completed reading (and integrates on, for the next one)."""
        if self._resets_itself and self._completes(line):
            self.device.zero()
        return line

    def _completes(self, line: str) -> bool:
        """Return True if the driver reads ``line`` as a completed reading."""
        reading = self.profile.reading
        group = reading.complete_group
        match = None if group is None else reading.pattern.fullmatch(line)
        return match is not None and match[group] == reading.complete_value

    # -- unasked lines (push mode) ------------------------------------------------------------
    def tick(self) -> list[str]:
        """Return the stream line and end-of-beam line due now (push mode only)."""
        if self.profile.mode != "push":
            return []
        device = self.device
        lines: list[str] = []
        now = device.clock()
        with device.lock:
            charge_nC, status = device.read()
            completed = device.deliveries_completed
            integrating = device.integrating
        if integrating and now - self._last_stream_at >= self.stream_period_s:
            self._last_stream_at = now
            lines.append(self.reading_line(charge_nC, status))
        if completed != self._deliveries_seen:
            self._deliveries_seen = completed
            if integrating:
                lines.append(self.reading_line(charge_nC, status, final=True))
        return [self._pushed(line) for line in lines]

    def tick_interval_s(self) -> float:
        """Return how often :meth:`tick` wants to be called, in wall seconds."""
        return min(self.stream_period_s, 0.02)


def _number(text: str | None) -> float:
    try:
        value = float(text or "")
    except ValueError:
        raise SimulatorInputError("value", text, "a number") from None
    if not math.isfinite(value):
        raise SimulatorInputError("value", text, "a finite number")
    return value
