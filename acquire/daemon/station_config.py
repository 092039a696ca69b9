"""The station configuration file: what ``chargebook serve`` runs with, so a unit file holds no
options.

``serve --config FILE``, else ``$XDG_CONFIG_HOME/chargebook/station.toml`` (``~/.config`` when
unset), else ``/etc/chargebook/station.toml``; no file is fine. Its keys (:data:`KEYS`) are the
``serve`` options of the same meaning; an option given on the command line overrides the key.
An unknown key, or a value of the wrong type, is refused by name before anything starts.
"""

from __future__ import annotations

import argparse
import os
import tomllib
from pathlib import Path
from typing import Any

from chargebook.corrections.errors import InputError

#: Each key, the ``serve`` argument it fills, the type it must have and what it means.
KEYS: dict[str, tuple[str, type, str]] = {
    "station_name": ("station_name", str, "the station's name, carried in every export"),
    "profile": ("profile", str, "instrument profile: a shipped name or a .toml file"),
    "port": ("port", str, "serial port, best by its stable /dev/serial/by-id/ name"),
    "resource": ("resource", str, "VISA resource, e.g. TCPIP::192.0.2.7::5025::SOCKET"),
    "visa_library": ("visa_library", str, "the VISA library pyvisa opens (default @py)"),
    "plan": ("plan", str, "measurement plan: a shipped name or a .toml file"),
    "database": ("db", str, "the station database file"),
    "thresholds": ("thresholds", str, "stability thresholds, a TOML file"),
    "socket": ("socket", str, "the control socket path"),
    "socket_group": ("socket_group", str, "a group whose members may use the sockets"),
    "sensor_port": ("sensor_port", str, "serial port of the thermometer-barometer"),
    "sensor_profile": ("sensor_profile", str, "the sensor's profile (default sensor-plain)"),
}
#: Keys naming the electrometer: one of them is the choice, and a command-line choice wins.
WHERE_KEYS = ("port", "resource")
SYSTEM_FILE = Path("/etc/chargebook/station.toml")


class ConfigError(InputError):
    """The station configuration file cannot be used as it is (the message names the key)."""


def default_config_path(environ: dict[str, str] | None = None) -> Path | None:
    """Return the station file to read when ``--config`` is not given, or None if none exists.

    ``$XDG_CONFIG_HOME/chargebook/station.toml`` (``~/.config/...`` when unset) comes first, then
    ``/etc/chargebook/station.toml``.
    """
    env = os.environ if environ is None else environ
    base = Path(env.get("XDG_CONFIG_HOME") or Path.home() / ".config")
    for candidate in (base / "chargebook" / "station.toml", SYSTEM_FILE):
        try:
            if candidate.is_file():
                return candidate
        except PermissionError:  # a folder this user may not look into holds no file for it
            continue
    return None


def read_config(path: Path) -> dict[str, Any]:
    """Return the keys of the station file at ``path``, checked: known, of the right type.

    Raises ConfigError naming the file and the offending key (unknown keys list the known ones).
    """
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as error:
        raise ConfigError(
            "--config", str(path), "a readable TOML file", f"cannot be read: {error}"
        ) from error
    except tomllib.TOMLDecodeError as error:
        raise ConfigError("--config", str(path), "valid TOML", f"is not TOML: {error}") from error
    for key, value in data.items():
        if key not in KEYS:
            raise ConfigError(f"{path}: {key}", value, ", ".join(KEYS), "is not a station file key")
        wanted = KEYS[key][1]
        if not isinstance(value, wanted):
            raise ConfigError(f"{path}: {key}", value, f"a {wanted.__name__}", "has the wrong type")
    if all(key in data for key in WHERE_KEYS):
        raise ConfigError(
            f"{path}: resource", data["resource"], "port or resource", "is given beside port"
        )
    return data


def apply_config(args: argparse.Namespace, data: dict[str, Any]) -> None:
    """Fill the ``serve`` arguments not given on the command line from the file's ``data``.

    A port or resource on the command line overrides both of the file's, so the choice of
    electrometer stays one.
    """
    cli_chose_where = any(getattr(args, KEYS[key][0], None) for key in WHERE_KEYS)
    for key, value in data.items():
        dest = KEYS[key][0]
        if key in WHERE_KEYS and cli_chose_where:
            continue
        if not hasattr(args, dest):
            raise ConfigError(
                key, value, "the keys serve reads", "is not read by this version of serve"
            )
        if getattr(args, dest) is None:
            setattr(args, dest, value)


def load_into(args: argparse.Namespace) -> Path | None:
    """Read ``args.config`` (or the default station file) into ``args``; return the file read.

    Raises ConfigError for a file that cannot be used, or when no profile or no electrometer
    (port or resource) is named anywhere.
    """
    path = Path(args.config).expanduser() if args.config else default_config_path()
    if path is not None:
        apply_config(args, read_config(path))
    if path is not None:
        missing = f"is given neither on the command line nor in {path}"
    else:
        missing = "is not given on the command line, and no station file was found"
    if not args.profile:
        raise ConfigError("--profile", None, "a profile name or file", missing)
    if not (args.port or args.resource):
        raise ConfigError("--port/--resource", None, "a serial device or a VISA resource", missing)
    return path
