"""Environment sensors (a digital thermometer, a barometer, or one instrument reading both) read
through a profile, as electrometers are.

A sensor profile is a TOML file in ``drivers_generic/profiles/`` whose name starts with
``sensor-`` (``sensor-plain.toml`` is the commented example). It declares the port, framing and
timing as an electrometer profile does, an ``[identity]`` (a query and a pattern with a named
group ``serial``), and one ``[[quantities]]`` entry per quantity read (``temperature`` or
``pressure``): in query mode the command that asks for it, and in both modes the pattern of the
line that carries it, with named groups ``value`` and ``unit``. In push mode the instrument
writes its lines unasked and the reader takes the next line of each quantity.

The driver converts units to °C and kPa (the units it knows are listed in :data:`UNITS`) and
returns what it read with the sensor's serial and the raw lines; corrections from the sensor's
certificate are the daemon's to apply, not the driver's.
"""

from __future__ import annotations

import re
import time
import tomllib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from chargebook.drivers_generic.interface import (
    InstrumentTimeout,
    ProtocolError,
    TrafficListener,
)
from chargebook.drivers_generic.profile import (
    MODES,
    PROFILE_DIR,
    Framing,
    PortSettings,
    ProfileError,
    Timing,
    _Builder,
)
from chargebook.drivers_generic.transport import Transport

#: The prefix of a sensor profile's name (electrometer profiles never carry it).
SENSOR_PREFIX = "sensor-"
QUANTITIES = ("temperature", "pressure")
#: kPa per mmHg: 101.325 kPa / 760 mmHg (the standard atmosphere's definition).
KPA_PER_MMHG = 101.325 / 760
#: Unit as written by an instrument -> (quantity, scale, offset): value in °C or kPa is
#: value × scale + offset.
UNITS: dict[str, tuple[str, float, float]] = {
    "C": ("temperature", 1.0, 0.0),
    "degC": ("temperature", 1.0, 0.0),
    "K": ("temperature", 1.0, -273.15),
    "kPa": ("pressure", 1.0, 0.0),
    "hPa": ("pressure", 0.1, 0.0),
    "mbar": ("pressure", 0.1, 0.0),
    "mmHg": ("pressure", KPA_PER_MMHG, 0.0),
}


def in_unit(value: float, unit: str) -> float:
    """Return a temperature in °C or a pressure in kPa written in ``unit`` (the inverse of the
    driver's conversion; the simulated sensor writes with it)."""
    _quantity, scale, offset = UNITS[unit]
    return (value - offset) / scale


@dataclass(frozen=True, slots=True)
class QuantitySpec:
    """How one quantity is asked for (``query``; None in push mode) and read (``pattern``);
    ``format`` is what the instrument writes (the simulator uses it)."""

    name: str
    query: str | None
    pattern: re.Pattern[str]
    format: str


@dataclass(frozen=True, slots=True)
class SensorProfile:
    """One environment sensor dialect, loaded from a TOML profile."""

    name: str
    description: str
    mode: str
    port: PortSettings
    framing: Framing
    timing: Timing
    identity_query: str
    identity_pattern: re.Pattern[str]
    identity_format: str
    quantities: tuple[QuantitySpec, ...]
    source: str = ""


@dataclass(frozen=True, slots=True)
class SensorReading:
    """What a sensor read: temperature in °C and pressure in kPa (None when it does not read
    one), as the instrument wrote them (``written``: quantity -> "value unit"), with its
    serial and the raw lines."""

    serial: str
    temperature_C: float | None
    pressure_kPa: float | None
    written: dict[str, str]
    lines: tuple[str, ...]


def available_sensor_profiles() -> list[str]:
    """Return the names of the sensor profiles shipped with chargebook, sorted."""
    return sorted(path.stem for path in PROFILE_DIR.glob(f"{SENSOR_PREFIX}*.toml"))


def load_sensor_profile(profile: str | Path) -> SensorProfile:
    """Return the sensor profile given by shipped name (``sensor-plain``) or by path."""
    path = Path(profile)
    if path.suffix != ".toml":
        path = PROFILE_DIR / f"{profile}.toml"
        if not str(profile).startswith(SENSOR_PREFIX) or not path.is_file():
            names = ", ".join(available_sensor_profiles())
            raise ProfileError(str(profile), "name", str(profile), f"one of {names}, or a path")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError, UnicodeDecodeError) as error:
        raise ProfileError(
            str(path), "file", path.name, f"a readable TOML file ({error})"
        ) from None
    return _build(_Builder(str(path), data))


def _build(builder: _Builder) -> SensorProfile:
    head = builder.table("profile")
    mode = builder.choice(head, "profile", "mode", MODES, "query")
    identity = builder.table("identity")
    entries = builder.data.get("quantities")
    if not isinstance(entries, list) or not entries:
        raise builder.fail("quantities", entries, "one or more [[quantities]] tables")
    quantities = []
    for index, entry in enumerate(entries):
        where = f"quantities[{index}]"
        query = entry.get("query")
        if mode == "query" and not isinstance(query, str):
            raise builder.fail(f"{where}.query", query, "the command asking for it (query mode)")
        quantities.append(
            QuantitySpec(
                name=builder.choice(entry, where, "name", QUANTITIES),
                query=query if mode == "query" else None,
                pattern=builder.regex(entry, where, "pattern", ("value", "unit")),
                format=builder.text(entry, where, "format", ""),
            )
        )
    return SensorProfile(
        name=builder.text(head, "profile", "name"),
        description=builder.text(head, "profile", "description", ""),
        mode=mode,
        port=builder.port(),
        framing=builder.framing(),
        timing=builder.timing(),
        identity_query=builder.text(identity, "identity", "query"),
        identity_pattern=builder.regex(identity, "identity", "pattern", ("serial",)),
        identity_format=builder.text(identity, "identity", "format", ""),
        quantities=tuple(quantities),
        source=builder.source,
    )


class EnvironmentSensor:
    """A thermometer and/or barometer on a transport, read through its profile."""

    def __init__(
        self,
        profile: SensorProfile,
        transport: Transport,
        *,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.profile = profile
        self.transport = transport
        self.clock = clock
        self.serial: str | None = None

    def open(self) -> str:
        """Open the wire and ask the sensor who it is; return its serial."""
        self.transport.open()
        line = self._ask(self.profile.identity_query, self.profile.identity_pattern)
        self.serial = line[1]["serial"]
        return self.serial

    def close(self) -> None:
        """Close the wire."""
        self.transport.close()

    def __enter__(self) -> EnvironmentSensor:
        if not self.transport.is_open:  # open_sensor has opened it already
            self.open()
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def read(self) -> SensorReading:
        """Return one reading of every quantity the profile declares, in °C and kPa."""
        values: dict[str, float] = {}
        written: dict[str, str] = {}
        lines: list[str] = []
        for spec in self.profile.quantities:
            if spec.query is None:
                text, groups = self._next_match(spec.pattern)
            else:
                text, groups = self._ask(spec.query, spec.pattern)
            lines.append(text)
            values[spec.name] = _converted(spec.name, groups["value"], groups["unit"], text)
            written[spec.name] = f"{groups['value']} {groups['unit']}"
        return SensorReading(
            serial=self.serial or "",
            temperature_C=values.get("temperature"),
            pressure_kPa=values.get("pressure"),
            written=written,
            lines=tuple(lines),
        )

    def _ask(self, query: str, pattern: re.Pattern[str]) -> tuple[str, dict[str, Any]]:
        """Send ``query`` (again after a timeout, up to the profile's retries) and return the
        answer matching ``pattern``."""
        for _attempt in range(self.profile.timing.retries + 1):
            self.transport.discard_input()
            self.transport.write_line(query)
            try:
                return self._next_match(pattern)
            except InstrumentTimeout:
                continue
        raise InstrumentTimeout(f"the sensor did not answer {query!r}")

    def _next_match(self, pattern: re.Pattern[str]) -> tuple[str, dict[str, Any]]:
        """Return the next line matching ``pattern`` within the timeout (others are skipped:
        a pushing sensor writes each quantity in turn)."""
        deadline = self.clock() + self.profile.timing.timeout_s
        while (left := deadline - self.clock()) > 0:
            received = self.transport.read_line(left)
            if received is None:
                break
            text = received.raw.decode(self.profile.framing.encoding, "replace").strip()
            found = pattern.fullmatch(text)
            if found:
                return text, found.groupdict()
        raise InstrumentTimeout(f"no line matching {pattern.pattern!r} from the sensor")


def _converted(quantity: str, value: str, unit: str, line: str) -> float:
    """Return ``value`` in °C or kPa; ProtocolError naming the line when it cannot be."""
    known = UNITS.get(unit)
    if known is None or known[0] != quantity:
        raise ProtocolError(f"{quantity} in unit {unit!r} is not known", line=line.encode())
    try:
        number = float(value)
    except ValueError:
        raise ProtocolError(f"{quantity} {value!r} is not a number", line=line.encode()) from None
    if number != number or number in (float("inf"), float("-inf")):
        raise ProtocolError(f"{quantity} {value!r} is not finite", line=line.encode())
    return number * known[1] + known[2]


def open_sensor(
    profile: str | Path | SensorProfile,
    *,
    port: str,
    traffic: TrafficListener | None = None,
    clock: Callable[[], float] = time.monotonic,
) -> EnvironmentSensor:
    """Return an opened sensor (its serial asked) on serial ``port``."""
    from chargebook.drivers_generic import build_transport

    loaded = profile if isinstance(profile, SensorProfile) else load_sensor_profile(profile)
    # build_transport reads the port, framing and timing, which a sensor profile has too
    transport = build_transport(loaded, port=port, traffic=traffic, clock=clock)  # type: ignore[arg-type]
    sensor = EnvironmentSensor(loaded, transport, clock=clock)
    sensor.open()
    return sensor
