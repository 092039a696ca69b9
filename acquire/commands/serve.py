"""`chargebook serve`: run the acquisition daemon on an electrometer."""

from __future__ import annotations

import argparse

HELP = "run the acquisition daemon: the electrometer, the plan, the record and the control socket"


def add_instrument_arguments(parser: argparse.ArgumentParser, *, required: bool = True) -> None:
    """Declare the options that choose the electrometer and the record (shared with `run`).

    ``required=False`` (serve): the profile, the electrometer and the plan may come from the
    station file instead, checked once it is read.
    """
    parser.add_argument(
        "--profile", required=required, help="instrument profile: a shipped name or a .toml file"
    )
    where = parser.add_mutually_exclusive_group(required=required)
    where.add_argument(
        "--port",
        metavar="DEVICE",
        help="serial port, best by its stable name: /dev/serial/by-id/usb-...",
    )
    where.add_argument(
        "--resource", metavar="VISA", help="VISA resource, e.g. TCPIP::127.0.0.1::5025::SOCKET"
    )
    parser.add_argument(
        "--visa-library",
        metavar="LIB",
        help="the VISA library pyvisa opens a --resource with: @py (pyvisa-py, the default), "
        "@ivi, or the path of a vendor's VISA library (default: $PYVISA_LIBRARY, else @py)",
    )
    parser.add_argument(
        "--plan",
        default="default" if required else None,
        help="measurement plan: a shipped name or a .toml file (default: default)",
    )
    parser.add_argument(
        "--db", metavar="FILE", help="station database (default: the user's data directory)"
    )
    parser.add_argument(
        "--bench-control",
        metavar="PATH",
        help="control socket of a simulated electrometer: the daemon then has its linac deliver "
        "each reading and turns its bias switch when a manual bias change is confirmed",
    )
    parser.add_argument(
        "--time-scale",
        type=float,
        default=1.0,
        metavar="X",
        help="multiply the plan's waiting times (end-of-beam hold, leakage, settling) by X "
        "(0.02: 50 times faster), to match a simulated electrometer started with the same "
        "--time-scale (default 1)",
    )
    parser.add_argument(
        "--thresholds",
        metavar="FILE",
        help="stability thresholds, a TOML file of chargebook.corrections.stability.Thresholds "
        "fields (relative_sd_pct, drift_pct_per_reading, leakage_pct, ...); others keep their "
        "documented defaults",
    )
    parser.add_argument(
        "--log-level",
        default="WARNING",
        choices=("DEBUG", "INFO", "WARNING", "ERROR"),
        help="what the daemon logs on stderr: WARNING (the default) says when the electrometer "
        "cannot be reached (once per new cause) and when the record cannot be written; INFO "
        "adds every retry and client connection; DEBUG everything",
    )


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Declare the daemon's options."""
    add_instrument_arguments(parser, required=False)
    parser.add_argument(
        "--socket",
        metavar="PATH",
        help="control socket path (default: $XDG_RUNTIME_DIR/chargebook/daemon.sock, "
        "else <tmp>/chargebook-<uid>/daemon.sock); its directory is made private (0700); "
        "the watch-only socket watch.sock is opened beside it",
    )
    parser.add_argument(
        "--socket-group",
        metavar="GROUP",
        help="let the members of GROUP use the sockets: their directory becomes 0750 and the "
        "sockets 0660, owned by GROUP (default: only this user)",
    )
    parser.add_argument(
        "--config",
        metavar="FILE",
        help="station file (TOML) with the keys station_name, profile, port or resource, "
        "visa_library, plan, database, thresholds, socket, socket_group, sensor_port, "
        "sensor_profile; options given here "
        "override it (default: $XDG_CONFIG_HOME/chargebook/station.toml, else "
        "/etc/chargebook/station.toml, when present)",
    )
    parser.add_argument(
        "--sensor-port",
        metavar="DEVICE",
        help="serial port of a digital thermometer-barometer: the daemon reads the air from it "
        "when a session starts, before each set and on demand (typed entries stay possible)",
    )
    parser.add_argument(
        "--sensor-profile",
        metavar="NAME",
        default="sensor-plain",
        help="the sensor's profile: a shipped sensor-* name or a .toml file (default sensor-plain)",
    )
    parser.add_argument(
        "--station-name",
        metavar="NAME",
        help="the station's name, recorded in the station file and carried in every export "
        "(default: keep the recorded one; a new file is named after the host)",
    )


def run(args: argparse.Namespace) -> int:
    """Run the daemon until SIGTERM or SIGINT; print its socket as a JSON line first."""
    from chargebook.acquire.daemon.main import serve_forever

    return serve_forever(args)
