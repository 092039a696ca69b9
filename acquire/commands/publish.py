"""`chargebook publish --to postgresql://...`: the station's closed sessions, into the
department record (one way; publishing again adds only what is new)."""

from __future__ import annotations

import argparse

from chargebook.acquire.commands.station_reader import add_db_argument

HELP = (
    "publish the station's closed sessions (finished, aborted, and reviews given later) one "
    "way into the department's PostgreSQL record; running it again adds only what is new"
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_db_argument(parser)
    parser.add_argument(
        "--to",
        metavar="URL",
        required=True,
        help="the department database, postgresql://USER@HOST/DATABASE (or with "
        "?host=/socket/folder); needs the department extra: pip install 'chargebook[department]'",
    )
    parser.add_argument(
        "--create-schema",
        action="store_true",
        help="first make the department record's tables, append-only triggers and the "
        "chargebook_publisher and chargebook_reader roles (once, as the database's owner)",
    )
    parser.add_argument(
        "-v", "--verbose", action="store_true", help="name each session as it is published"
    )


def run(args: argparse.Namespace) -> int:
    import sys
    from pathlib import Path

    from chargebook.acquire.commands.station_reader import missing_station_words
    from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK
    from chargebook.acquire.record import department
    from chargebook.acquire.record.store import Store, StoreError, default_db_path

    if not department.is_department_url(args.to):
        allowed = " or ".join(department.URL_PREFIXES)
        print(
            f"chargebook: --to {args.to!r} is not a PostgreSQL URL ({allowed}...)", file=sys.stderr
        )
        return EXIT_INVALID_INPUT
    path = Path(args.db or default_db_path())
    if not path.is_file():
        print(f"chargebook: {missing_station_words(path)}", file=sys.stderr)
        return EXIT_INVALID_INPUT

    def told(session, rows: int) -> None:
        if args.verbose:
            print(f"published session {session.id} ({session.uuid}): {rows} rows", flush=True)

    try:
        with (
            Store.open(path, read_only=True) as store,
            department.open_department(args.to, require_record=not args.create_schema) as database,
        ):
            if args.create_schema:
                department.create_schema(database)
            done = department.publish_station(store, database, told)
    except StoreError as error:
        print(f"chargebook: {error}", file=sys.stderr)
        return EXIT_FAILURE
    print(
        f"published {done.sessions_published} session(s) of station {done.station.name} "
        f"({done.station.uuid}) to {department.shown_url(args.to)}: {done.rows} rows; "
        f"{done.sessions_already} already there; {done.sessions_not_closed} not closed yet "
        "(published once finished or aborted)"
    )
    return EXIT_OK
