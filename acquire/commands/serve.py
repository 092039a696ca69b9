"""`chargebook serve`: run the acquisition daemon on an electrometer."""

from __future__ import annotations

import argparse

HELP = "run the acquisition daemon: the electrometer, the plan, the record and the control socket"


def add_instrument_arguments(parser: argparse.ArgumentParser) -> None:
    """Declare the options that choose the electrometer and the record (shared with `run`)."""
    parser.add_argument(
        "--profile", required=True, help="instrument profile: a shipped name or a .toml file"
    )
    where = parser.add_mutually_exclusive_group(required=True)
    where.add_argument("--port", metavar="DEVICE", help="serial port, e.g. /dev/ttyUSB0")
    where.add_argument(
        "--resource", metavar="VISA", help="VISA resource, e.g. TCPIP::127.0.0.1::5025::SOCKET"
    )
    parser.add_argument(
        "--plan", default="default", help="measurement plan: a shipped name or a .toml file"
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
        "--log-level", default="WARNING", choices=("DEBUG", "INFO", "WARNING", "ERROR")
    )


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Declare the daemon's options."""
    add_instrument_arguments(parser)
    parser.add_argument(
        "--socket",
        metavar="PATH",
        help="control socket path (default: $XDG_RUNTIME_DIR/chargebook/daemon.sock, "
        "else <tmp>/chargebook-<uid>/daemon.sock); its directory is made private (0700)",
    )
    parser.add_argument(
        "--station-name",
        metavar="NAME",
        help="the station's name, recorded in the station file and carried in every export "
        "(default: keep the recorded one; a new file is named after the host)",
    )


def run(args: argparse.Namespace) -> int:
    """Run the daemon until SIGTERM or SIGINT; print its socket as a JSON line first."""
    from chargebook.acquire.daemon_main import serve_forever

    return serve_forever(args)
