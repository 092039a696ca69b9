"""`chargebook backup --db STATION OUT`: a consistent, verified copy of a station file."""

from __future__ import annotations

import argparse
from pathlib import Path

from chargebook.acquire.commands.station_reader import add_db_argument

HELP = (
    "copy the station file consistently, even while the daemon measures (SQLite's online "
    "backup), and verify the copy's hash chains"
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_db_argument(parser)
    parser.add_argument("out", metavar="OUT", type=Path, help="the copy to write")
    parser.add_argument("--force", action="store_true", help="replace OUT if it exists")


def run(args: argparse.Namespace) -> int:
    import sys

    from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK
    from chargebook.acquire.record.backup import backup_station
    from chargebook.acquire.record.store import StoreError, default_db_path
    from chargebook.corrections.errors import InputError

    try:
        result = backup_station(Path(args.db or default_db_path()), args.out, force=args.force)
    except InputError as error:
        print(f"chargebook: {error}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    except (StoreError, OSError) as error:
        print(f"chargebook: the backup failed: {error}", file=sys.stderr)
        return EXIT_FAILURE
    if not result.verified:
        print(f"wrote {result.path}, but it DOES NOT VERIFY:", file=sys.stderr)
        print("\n".join(result.problems), file=sys.stderr)
        return EXIT_FAILURE
    print(
        f"wrote {result.path}: {result.sessions} session(s), "
        f"{result.chains_checked} hash chain(s) verified"
    )
    return EXIT_OK
