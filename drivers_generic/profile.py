"""Instrument profiles: a TOML file that describes one electrometer dialect as data.

A profile says how to open the port (baud, byte size, parity, stop bits, flow control), how lines
are framed (terminators, encoding, the longest line accepted), how long to wait and how often to
retry, which commands exist (each a declaration: name, template, parser, validator, unit), what a
reading line looks like (a regular expression with named groups ``value``, ``unit``, ``status``),
and how the instrument confirms or refuses a command. A new electrometer is a new profile, not new
code. The shipped profiles live in ``drivers_generic/profiles/``; see ``query-plain.toml`` for a
fully commented example. Each is named for its dialect; the names of the first release still work
for one more release (``profile_aliases``).

Some fields (``format`` strings) describe what the instrument *writes*; the driver never uses
them, the simulated electrometer does, so that it speaks the dialect of the profile it was given.
"""

from __future__ import annotations

import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from chargebook.drivers_generic.interface import Capability, ReadingStatus, SettingOutOfRange
from chargebook.drivers_generic.profile_aliases import current_profile_name

PROFILE_DIR = Path(__file__).with_name("profiles")

MODES = ("query", "push")
NUMBER_FORMATS = ("plain", "exponent", "engineering")
PARSERS = ("ack", "reading", "identity")
CONFIRM_STYLES = ("ack", "error_queue")
PARITIES = ("N", "E", "O", "M", "S")
BYTESIZES = (5, 6, 7, 8)
STOPBITS = (1, 1.5, 2)
FLOW_CONTROLS = ("none", "rtscts", "xonxoff", "dsrdtr")
ENCODINGS = ("ascii", "utf-8", "latin-1")

#: Charge units a reading may carry, as the factor that turns one of them into nanocoulombs.
CHARGE_UNITS_IN_nC: dict[str, float] = {
    "C": 1e9,
    "mC": 1e6,
    "uC": 1e3,
    "nC": 1.0,
    "pC": 1e-3,
    "fC": 1e-6,
}

#: The commands a driver knows by name, and the capability each one serves.
COMMAND_CAPABILITY: dict[str, Capability] = {
    "identify": Capability.IDENTIFY,
    "zero": Capability.ZERO,
    "start": Capability.INTEGRATE,
    "stop": Capability.INTEGRATE,
    "read": Capability.READ_CHARGE,
    "set_bias": Capability.SET_BIAS,
    "set_range": Capability.SET_RANGE,
}

#: Capabilities that come from the profile's mode rather than from a command.
PUSH_CAPABILITIES = frozenset({Capability.STREAM, Capability.PUSH_READINGS})


class ProfileError(ValueError):
    """A profile file is missing, unreadable or holds a value outside what is allowed."""

    def __init__(self, source: str, field: str, value: object, allowed: str) -> None:
        super().__init__(
            f"profile {source}: {field} = {value!r} is not allowed; allowed: {allowed}"
        )
        self.source = source
        self.field = field
        self.value = value
        self.allowed = allowed


@dataclass(frozen=True, slots=True)
class PortSettings:
    """Serial line settings: ``baud`` in bit/s, ``stopbits`` in bits."""

    baud: int = 9600
    bytesize: int = 8
    parity: str = "N"
    stopbits: float = 1
    flow_control: str = "none"


@dataclass(frozen=True, slots=True)
class Framing:
    """How lines are cut: terminators as bytes, the encoding, and the longest line in bytes."""

    write_terminator: bytes = b"\r\n"
    read_terminator: bytes = b"\r\n"
    encoding: str = "ascii"
    max_line_bytes: int = 256


@dataclass(frozen=True, slots=True)
class Timing:
    """How long to wait for a reply (seconds) and how often to resend a command that got none."""

    timeout_s: float = 1.0
    retries: int = 2


@dataclass(frozen=True, slots=True)
class ArgumentRule:
    """The validator of one command argument: a numeric range or a list of choices, never both."""

    name: str
    minimum: float | None = None
    maximum: float | None = None
    choices: tuple[str, ...] = ()
    unit: str = ""

    def check(self, value: object) -> object:
        """Return ``value`` if allowed; else raise SettingOutOfRange naming the limits."""
        if self.choices:
            if str(value) not in self.choices:
                raise SettingOutOfRange(self.name, value, "one of " + ", ".join(self.choices))
            return str(value)
        allowed = f"{self.minimum} to {self.maximum} {self.unit}".rstrip()
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise SettingOutOfRange(self.name, value, f"a number from {allowed}")
        if not math.isfinite(value):
            raise SettingOutOfRange(self.name, value, f"a finite number from {allowed}")
        if self.minimum is not None and value < self.minimum:
            raise SettingOutOfRange(self.name, value, allowed)
        if self.maximum is not None and value > self.maximum:
            raise SettingOutOfRange(self.name, value, allowed)
        return value


@dataclass(frozen=True, slots=True)
class CommandSpec:
    """One command declared as data: what to send, how to read the answer, what arguments allow.

    ``templates`` are sent in turn (each confirmed before the next); ``parser`` is one of
    ``ack`` (a confirmation), ``reading`` (a charge line) or ``identity``.
    """

    name: str
    templates: tuple[str, ...]
    parser: str
    arguments: dict[str, ArgumentRule] = field(default_factory=dict)
    unit: str = ""

    def render(self, **values: object) -> list[str]:
        """Return the command lines to send, after validating every argument strictly."""
        missing = set(self.arguments) - set(values)
        if missing:
            name = sorted(missing)[0]
            raise SettingOutOfRange(name, None, f"a value for {name} is required by {self.name}")
        checked = {name: rule.check(values[name]) for name, rule in self.arguments.items()}
        return [template.format(**checked) for template in self.templates]


@dataclass(frozen=True, slots=True)
class ReadingFormat:
    """What a charge line looks like, and how to turn it into nanocoulombs and a status."""

    pattern: re.Pattern[str]
    number_format: str
    unit: str
    status_map: dict[str, ReadingStatus]
    complete_group: str | None = None
    complete_value: str | None = None
    overrange_abs: float | None = None
    #: What the instrument writes (used by the simulated electrometer only).
    format: str = ""
    final_format: str = ""
    digits: int = 4


@dataclass(frozen=True, slots=True)
class Confirmation:
    """How the instrument confirms a command.

    ``ack``: it answers each command with a line matching ``ack_pattern`` or ``error_pattern``.
    ``error_queue``: it answers nothing; the driver then sends ``error_query`` and reads entries
    matching ``error_pattern`` (groups ``code``, ``message``) until ``code`` is ``no_error_code``.
    """

    style: str
    ack_pattern: re.Pattern[str] | None = None
    error_pattern: re.Pattern[str] | None = None
    error_query: str = ""
    no_error_code: int = 0
    error_messages: dict[str, str] = field(default_factory=dict)
    #: What the instrument writes (used by the simulated electrometer only).
    ack_format: str = ""
    error_format: str = ""


@dataclass(frozen=True, slots=True)
class IdentityFormat:
    """The identity reply: a pattern with groups manufacturer, model, serial, firmware."""

    pattern: re.Pattern[str]
    format: str = ""


@dataclass(frozen=True, slots=True)
class Profile:
    """One electrometer dialect, loaded from a TOML profile."""

    name: str
    description: str
    mode: str
    capabilities: frozenset[Capability]
    port: PortSettings
    framing: Framing
    timing: Timing
    reading: ReadingFormat
    confirmation: Confirmation
    identity: IdentityFormat | None
    commands: dict[str, CommandSpec]
    source: str = ""

    def command(self, name: str) -> CommandSpec:
        """Return the declaration of command ``name`` (KeyError if the profile lacks it)."""
        return self.commands[name]


def available_profiles() -> list[str]:
    """Return the names of the electrometer profiles shipped with chargebook, sorted (those
    of environment sensors, ``sensor-*``, are listed by ``available_sensor_profiles``)."""
    return sorted(
        path.stem for path in PROFILE_DIR.glob("*.toml") if not path.stem.startswith("sensor-")
    )


def resolve_profile_path(profile: str | Path) -> Path:
    """Return the file of a profile given by shipped name (an old name too) or by path."""
    path = Path(profile)
    if path.suffix == ".toml" or path.exists():
        if not path.is_file():
            raise ProfileError(str(profile), "path", str(profile), "an existing .toml file")
        return path
    shipped = PROFILE_DIR / f"{current_profile_name(str(profile))}.toml"
    if not shipped.is_file():
        names = ", ".join(available_profiles())
        raise ProfileError(str(profile), "name", str(profile), f"one of {names}, or a .toml path")
    return shipped


def load_profile(profile: str | Path) -> Profile:
    """Return the profile given by shipped name (``query-plain``) or by path, strictly validated."""
    path = resolve_profile_path(profile)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as error:
        raise ProfileError(str(path), "file", path.name, f"valid TOML ({error})") from error
    return _Builder(str(path), data).build()


class _Builder:
    """Reads the TOML tables of one profile, naming the exact field of any bad value."""

    def __init__(self, source: str, data: dict[str, Any]) -> None:
        self.source = source
        self.data = data

    def fail(self, field_name: str, value: object, allowed: str) -> ProfileError:
        return ProfileError(self.source, field_name, value, allowed)

    def table(self, name: str, required: bool = True) -> dict[str, Any]:
        value = self.data.get(name)
        if value is None and not required:
            return {}
        if not isinstance(value, dict):
            raise self.fail(f"[{name}]", value, "a table")
        return value

    def choice(self, table: dict[str, Any], where: str, key: str, allowed: tuple, default=None):
        value = table.get(key, default)
        if value not in allowed:
            raise self.fail(f"{where}.{key}", value, "one of " + ", ".join(map(str, allowed)))
        return value

    def number(self, table: dict, where: str, key: str, low: float, high: float, default=None):
        value = table.get(key, default)
        ok = isinstance(value, int | float) and not isinstance(value, bool)
        if not ok or not low <= value <= high:
            raise self.fail(f"{where}.{key}", value, f"a number from {low} to {high}")
        return value

    def regex(self, table: dict, where: str, key: str, groups: tuple[str, ...] = ()):
        text = table.get(key)
        if not isinstance(text, str):
            raise self.fail(f"{where}.{key}", text, "a regular expression")
        try:
            pattern = re.compile(text, re.ASCII)
        except re.error as error:
            raise self.fail(
                f"{where}.{key}", text, f"a valid regular expression ({error})"
            ) from None
        for group in groups:
            if group not in pattern.groupindex:
                raise self.fail(f"{where}.{key}", text, f"a pattern with a named group '{group}'")
        return pattern

    def text(self, table: dict, where: str, key: str, default: str | None = None) -> str:
        value = table.get(key, default)
        if not isinstance(value, str):
            raise self.fail(f"{where}.{key}", value, "a string")
        return value

    def build(self) -> Profile:
        head = self.table("profile")
        name = self.text(head, "profile", "name")
        mode = self.choice(head, "profile", "mode", MODES, "query")
        commands = self.commands()
        capabilities = self.capabilities(head, mode, commands)
        return Profile(
            name=name,
            description=self.text(head, "profile", "description", ""),
            mode=mode,
            capabilities=capabilities,
            port=self.port(),
            framing=self.framing(),
            timing=self.timing(),
            reading=self.reading(),
            confirmation=self.confirmation(),
            identity=self.identity(),
            commands=commands,
            source=self.source,
        )

    def capabilities(self, head: dict, mode: str, commands: dict) -> frozenset[Capability]:
        names = head.get("capabilities")
        allowed = tuple(c.value for c in Capability)
        if not isinstance(names, list):
            raise self.fail("profile.capabilities", names, "a list of " + ", ".join(allowed))
        capabilities: set[Capability] = set()
        for value in names:
            if value not in allowed:
                raise self.fail("profile.capabilities", value, "one of " + ", ".join(allowed))
            capabilities.add(Capability(value))
        for command_name, capability in COMMAND_CAPABILITY.items():
            if capability in capabilities and command_name not in commands:
                raise self.fail(
                    "commands",
                    command_name,
                    f"a [[commands]] entry, since {capability} is declared",
                )
        if capabilities & PUSH_CAPABILITIES and mode != "push":
            raise self.fail("profile.mode", mode, "push, since stream/push_readings are declared")
        if Capability.AUTO_RESET in capabilities and Capability.PUSH_READINGS not in capabilities:
            raise self.fail(
                "profile.capabilities",
                Capability.AUTO_RESET.value,
                "declared with push_readings: it resets after a completed reading it pushes",
            )
        return frozenset(capabilities)

    def port(self) -> PortSettings:
        table = self.table("port", required=False)
        return PortSettings(
            baud=int(self.number(table, "port", "baud", 50, 4_000_000, 9600)),
            bytesize=self.choice(table, "port", "bytesize", BYTESIZES, 8),
            parity=self.choice(table, "port", "parity", PARITIES, "N"),
            stopbits=self.choice(table, "port", "stopbits", STOPBITS, 1),
            flow_control=self.choice(table, "port", "flow_control", FLOW_CONTROLS, "none"),
        )

    def framing(self) -> Framing:
        table = self.table("framing", required=False)
        encoding = self.choice(table, "framing", "encoding", ENCODINGS, "ascii")
        terminators = {}
        for key in ("write_terminator", "read_terminator"):
            value = self.text(table, "framing", key, "\r\n")
            if not value:
                raise self.fail(f"framing.{key}", value, "one or more characters such as \\r\\n")
            terminators[key] = value.encode(encoding)
        return Framing(
            encoding=encoding,
            max_line_bytes=int(self.number(table, "framing", "max_line_bytes", 16, 65536, 256)),
            **terminators,
        )

    def timing(self) -> Timing:
        table = self.table("timing", required=False)
        return Timing(
            timeout_s=float(self.number(table, "timing", "timeout_s", 0.001, 600, 1.0)),
            retries=int(self.number(table, "timing", "retries", 0, 20, 2)),
        )

    def reading(self) -> ReadingFormat:
        table = self.table("reading")
        pattern = self.regex(table, "reading", "pattern", ("value",))
        unit = self.choice(table, "reading", "unit", tuple(CHARGE_UNITS_IN_nC), "nC")
        raw_status = table.get("status", {})
        if not isinstance(raw_status, dict):
            raise self.fail("reading.status", raw_status, "a table of instrument word = status")
        allowed = tuple(s.value for s in ReadingStatus)
        status_map = {}
        for word, status in raw_status.items():
            if status not in allowed:
                raise self.fail(f"reading.status.{word}", status, "one of " + ", ".join(allowed))
            status_map[word] = ReadingStatus(status)
        if "status" in pattern.groupindex and not status_map:
            raise self.fail("reading.status", raw_status, "a table for the pattern's status group")
        complete = table.get("complete", {})
        complete_group = complete.get("group") if isinstance(complete, dict) else None
        if complete_group is not None and complete_group not in pattern.groupindex:
            raise self.fail("reading.complete.group", complete_group, "a group of reading.pattern")
        overrange = table.get("overrange_abs")
        if overrange is not None:
            overrange = float(self.number(table, "reading", "overrange_abs", 0, math.inf))
        return ReadingFormat(
            pattern=pattern,
            number_format=self.choice(table, "reading", "number_format", NUMBER_FORMATS),
            unit=unit,
            status_map=status_map,
            complete_group=complete_group,
            complete_value=complete.get("value") if isinstance(complete, dict) else None,
            overrange_abs=overrange,
            format=self.text(table, "reading", "format", ""),
            final_format=self.text(table, "reading", "final_format", ""),
            digits=int(self.number(table, "reading", "digits", 1, 15, 4)),
        )

    def confirmation(self) -> Confirmation:
        table = self.table("confirmation")
        style = self.choice(table, "confirmation", "style", CONFIRM_STYLES)
        messages = table.get("error_messages", {})
        if not isinstance(messages, dict):
            raise self.fail("confirmation.error_messages", messages, "a table of code = text")
        if style == "ack":
            return Confirmation(
                style=style,
                ack_pattern=self.regex(table, "confirmation", "ack_pattern"),
                error_pattern=self.regex(table, "confirmation", "error_pattern", ("code",)),
                error_messages={str(k): str(v) for k, v in messages.items()},
                ack_format=self.text(table, "confirmation", "ack_format", ""),
                error_format=self.text(table, "confirmation", "error_format", ""),
            )
        return Confirmation(
            style=style,
            error_pattern=self.regex(table, "confirmation", "error_pattern", ("code", "message")),
            error_query=self.text(table, "confirmation", "error_query"),
            no_error_code=int(self.number(table, "confirmation", "no_error_code", -1e9, 1e9, 0)),
            error_messages={str(k): str(v) for k, v in messages.items()},
        )

    def identity(self) -> IdentityFormat | None:
        table = self.table("identity", required=False)
        if not table:
            return None
        groups = ("manufacturer", "model", "serial", "firmware")
        return IdentityFormat(
            pattern=self.regex(table, "identity", "pattern", groups),
            format=self.text(table, "identity", "format", ""),
        )

    def commands(self) -> dict[str, CommandSpec]:
        entries = self.data.get("commands", [])
        if not isinstance(entries, list):
            raise self.fail("commands", entries, "an array of [[commands]] tables")
        commands: dict[str, CommandSpec] = {}
        for index, entry in enumerate(entries):
            where = f"commands[{index}]"
            name = self.choice(entry, where, "name", tuple(COMMAND_CAPABILITY))
            if name in commands:
                raise self.fail(f"{where}.name", name, "each command declared once")
            template = entry.get("template")
            templates = (template,) if isinstance(template, str) else template
            if not isinstance(templates, list | tuple) or not all(
                isinstance(t, str) and t for t in templates
            ):
                raise self.fail(f"{where}.template", template, "a string or a list of strings")
            commands[name] = CommandSpec(
                name=name,
                templates=tuple(templates),
                parser=self.choice(entry, where, "parser", PARSERS),
                arguments=self.arguments(entry, where),
                unit=self.text(entry, where, "unit", ""),
            )
        return commands

    def arguments(self, entry: dict, where: str) -> dict[str, ArgumentRule]:
        raw = entry.get("validate", {})
        if not isinstance(raw, dict):
            raise self.fail(
                f"{where}.validate", raw, "a table of argument = {min, max} or {choices}"
            )
        rules = {}
        for arg, rule in raw.items():
            if not isinstance(rule, dict):
                raise self.fail(f"{where}.validate.{arg}", rule, "a table {min, max} or {choices}")
            choices = rule.get("choices", [])
            if choices:
                rules[arg] = ArgumentRule(arg, choices=tuple(str(c) for c in choices))
                continue
            low = self.number(rule, f"{where}.validate.{arg}", "min", -1e12, 1e12)
            high = self.number(rule, f"{where}.validate.{arg}", "max", low, 1e12)
            unit = self.text(rule, f"{where}.validate.{arg}", "unit", entry.get("unit", ""))
            rules[arg] = ArgumentRule(arg, minimum=low, maximum=high, unit=unit)
        return rules
