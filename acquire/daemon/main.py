"""Starting the daemon from the command line: options, signals, the JSON line on stdout."""

from __future__ import annotations

import argparse
import asyncio
import json
import logging
import signal
import sys
from pathlib import Path

from chargebook.acquire import protocol
from chargebook.acquire.daemon import sd_notify
from chargebook.acquire.daemon.daemon import Daemon, DaemonOptions
from chargebook.acquire.exit_codes import (
    EXIT_FAILURE,
    EXIT_INVALID_INPUT,
    EXIT_LINES_SET_ASIDE,
    EXIT_OK,
)

log = logging.getLogger(__name__)


def options_from_args(args: argparse.Namespace, socket_path: Path | None = None) -> DaemonOptions:
    """Return the daemon's options from parsed `serve`/`run` arguments, checked.

    Raises InputError naming the option for a time scale that is not positive or a plan that
    cannot be loaded, so a mistake is reported before anything starts.
    """
    from chargebook.acquire.record.store import default_db_path
    from chargebook.acquire.session.plan import load_plan
    from chargebook.acquire.session.rules import load_thresholds
    from chargebook.corrections.errors import InputError

    if not args.time_scale > 0:
        raise InputError("--time-scale", args.time_scale, "a number above 0")
    plan = args.plan or "default"  # serve leaves it unset until its station file is read
    load_plan(plan)
    station_name = getattr(args, "station_name", None)
    if station_name is not None and not station_name.strip():
        raise InputError("--station-name", station_name, "a non-empty name")
    socket = socket_path or Path(getattr(args, "socket", None) or protocol.default_socket_path())
    return DaemonOptions(
        profile=args.profile,
        db_path=Path(args.db).expanduser() if args.db else default_db_path(),
        socket_path=socket,
        port=args.port,
        resource=args.resource,
        plan=plan,
        bench_control=args.bench_control,
        time_scale=args.time_scale,
        thresholds=load_thresholds(args.thresholds) if args.thresholds else None,
        visa_library=getattr(args, "visa_library", None),
        socket_group=getattr(args, "socket_group", None),
        station_name=station_name,
        sensor_port=getattr(args, "sensor_port", None),
        sensor_profile=getattr(args, "sensor_profile", None) or "sensor-plain",
    )


def startup_errors() -> tuple[type[BaseException], ...]:
    """Return the exceptions that mean the daemon cannot start as asked (exit 2)."""
    from chargebook.acquire.daemon.server import SocketInUse, UnsafeSocketDirectory
    from chargebook.acquire.record.station_lock import StationInUse
    from chargebook.acquire.record.store import StoreError
    from chargebook.drivers_generic import ProfileError
    from chargebook.drivers_generic.interface import SettingOutOfRange

    return (
        SocketInUse,
        UnsafeSocketDirectory,
        StationInUse,
        StoreError,
        ProfileError,
        SettingOutOfRange,
    )


def serve_forever(args: argparse.Namespace) -> int:
    """Run `chargebook serve`: print the ready line, serve until SIGTERM/SIGINT, exit status."""
    from chargebook.corrections.errors import InputError

    logging.basicConfig(
        level=args.log_level, stream=sys.stderr, format="%(asctime)s %(name)s %(message)s"
    )
    try:
        from chargebook.acquire.daemon.station_config import load_into

        load_into(args)
        args.plan = args.plan or "default"
        options = options_from_args(args)
        return asyncio.run(_serve(options))
    except (InputError, *startup_errors()) as error:
        print(f"chargebook serve: {error}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    except OSError as error:
        print(f"chargebook serve: {error}", file=sys.stderr)
        return EXIT_FAILURE


def print_ready(info: dict) -> None:
    """Print the daemon's ready line (one JSON object) on stdout and flush it."""
    print(json.dumps(info), flush=True)


async def _serve(options: DaemonOptions) -> int:
    daemon = Daemon(options)
    loop = asyncio.get_running_loop()
    for signum in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(signum, daemon.shutdown, signal.Signals(signum).name)

    def ready(info: dict) -> None:
        print_ready(info)
        sd_notify.notify(sd_notify.READY)

    await daemon.run(ready)
    if daemon.stop_problem is None:
        return EXIT_OK
    print(f"chargebook serve: {daemon.stop_problem}", file=sys.stderr)
    return EXIT_LINES_SET_ASIDE if daemon.set_aside_in is not None else EXIT_FAILURE
