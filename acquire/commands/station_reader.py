"""What the read-side commands (sessions, show, export, history) share: the --db option,
opening the station database read-only, and reporting failures in words.

Light at import: the store (and sqlite-utils) is imported only when a command runs.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK

if TYPE_CHECKING:
    from chargebook.acquire.record.store import Store

DB_HELP = (
    "the station database (default: $XDG_DATA_HOME/chargebook/station.sqlite, "
    "else ~/.local/share/chargebook/station.sqlite)"
)


def add_db_argument(parser: argparse.ArgumentParser) -> None:
    """Add ``--db FILE`` to a read-side command."""
    parser.add_argument("--db", metavar="FILE", type=Path, default=None, help=DB_HELP)


def add_output_argument(parser: argparse.ArgumentParser) -> None:
    """Add ``-o/--output FILE``: write there (whole, or not at all) instead of stdout."""
    parser.add_argument(
        "-o", "--output", metavar="FILE", type=Path, help="write here instead of stdout"
    )


def add_session_argument(parser: argparse.ArgumentParser) -> None:
    """Add the SESSION positional argument (a session id, as `chargebook sessions` lists)."""
    parser.add_argument("session", metavar="SESSION", type=int, help="session id")


def add_session_or_visit_arguments(parser: argparse.ArgumentParser) -> None:
    """Add an optional SESSION and ``--visit ID`` (a calibration visit): one of the two."""
    parser.add_argument("session", metavar="SESSION", type=int, nargs="?", help="session id")
    parser.add_argument(
        "--visit", metavar="ID", type=int, help="a calibration visit instead of a session"
    )


def require_session_or_visit(args: argparse.Namespace) -> None:
    """Raise InputError unless exactly one of SESSION and ``--visit`` is given."""
    from chargebook.corrections.errors import InputError

    if args.session is None and args.visit is None:
        raise InputError("SESSION", None, "a session id, or --visit ID", "is missing")
    if args.session is not None and args.visit is not None:
        raise InputError(
            "--visit", args.visit, "a session id or --visit ID, not both", "is given with a session"
        )


def open_station(args: argparse.Namespace) -> Store:
    """Return the station database named by ``--db`` (or the default), opened read-only."""
    from chargebook.acquire.record.store import Store, default_db_path

    return Store.open(args.db or default_db_path(), read_only=True)


def missing_station_words(path: Path) -> str:
    """Return the sentence for a station database that does not exist, naming the demo's."""
    from chargebook.acquire.record.store import default_db_path

    words = f"no station database at {path} (pass --db FILE to choose one)"
    demo = default_db_path().with_name("demo.sqlite")
    if demo.exists() and demo != path:
        words += f"; the demo's sessions are in {demo} (--db {demo})"
    return words


def run_reader(args: argparse.Namespace, body: Callable[[Store], int]) -> int:
    """Open the station read-only, run ``body`` on it, and turn known failures into words.

    A missing database, a missing session or bad input exits with status 2, a database that
    cannot be read with 1; each prints one line on stderr saying what is wrong.
    """
    from chargebook.acquire.record.store import (
        NotFound,
        StoreError,
        UnreadableRecord,
        default_db_path,
    )
    from chargebook.corrections.errors import InputError

    path = args.db or default_db_path()
    if not Path(path).is_file():
        print(f"chargebook: {missing_station_words(Path(path))}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    try:
        store = open_station(args)
    except StoreError as error:
        print(f"chargebook: {error}", file=sys.stderr)
        return EXIT_FAILURE
    try:
        return body(store)
    except NotFound as error:
        print(f"chargebook: {error} (`chargebook sessions` lists them)", file=sys.stderr)
        return EXIT_INVALID_INPUT
    except InputError as error:
        print(f"chargebook: {error}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    except UnreadableRecord as error:  # a damaged file shows only when its pages are read
        print(
            f"chargebook: the station database {store.path} cannot be read: {error}; "
            "restore it from a backup (`sqlite3 FILE .recover` may save what is left)",
            file=sys.stderr,
        )
        return EXIT_FAILURE
    except BrokenPipeError:
        # Whoever read the output went away (`| head`): stop quietly, as the Python
        # documentation on SIGPIPE advises, so that the interpreter's final flush stays silent.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_FAILURE
    finally:
        store.close()


def write_output(text: str, output: Path | None) -> int:
    """Write ``text`` to ``output`` (whole, or not at all), or to stdout when it is None."""
    if output is None:
        sys.stdout.write(text)
        return EXIT_OK
    partial = output.with_name(f".{output.name}.partial")
    try:
        partial.write_text(text, encoding="utf-8")
        partial.replace(output)
    except OSError as error:
        partial.unlink(missing_ok=True)
        print(f"chargebook: cannot write {output}: {error.strerror}", file=sys.stderr)
        return EXIT_FAILURE
    print(f"wrote {output}", file=sys.stderr)
    return EXIT_OK
