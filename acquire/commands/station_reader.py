"""What the read-side commands (sessions, show, export, history) share: the --db option,
opening the station database read-only (or the department record on PostgreSQL, one station's
sessions at a time through the same read methods), and reporting failures in words.

Light at import: the store (and sqlite-utils) is imported only when a command runs.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK

TYPE_CHECKING = False  # not typing's: `chargebook --help` imports no typing (DEVELOPERS.md)
if TYPE_CHECKING:
    from chargebook.acquire.record.department import DepartmentDatabase
    from chargebook.acquire.record.reader import RecordReader
    from chargebook.acquire.record.store import Store

DB_HELP = (
    "the station database (default: $XDG_DATA_HOME/chargebook/station.sqlite, "
    "else ~/.local/share/chargebook/station.sqlite)"
)


def add_db_argument(parser: argparse.ArgumentParser) -> None:
    """Add ``--db FILE`` to a read-side command."""
    parser.add_argument("--db", metavar="FILE", type=Path, default=None, help=DB_HELP)


def _record_location(text: str) -> Path | str:
    """Return a station file's path, or a department database's URL as given."""
    from chargebook.acquire.record.department import is_department_url

    return text if is_department_url(text) else Path(text)


def add_record_argument(parser: argparse.ArgumentParser) -> None:
    """Add ``--db FILE|URL`` and ``--station``: a station file, or the department record."""
    parser.add_argument(
        "--db",
        metavar="FILE|URL",
        type=_record_location,
        default=None,
        help=DB_HELP + "; or the department record, postgresql://... (`chargebook publish`)",
    )
    parser.add_argument(
        "--station",
        metavar="NAME|UUID",
        help="with --db postgresql://...: only the sessions of this station (default: every "
        "station published there)",
    )


def add_output_argument(parser: argparse.ArgumentParser) -> None:
    """Add ``-o/--output FILE``: write there (whole, or not at all) instead of stdout."""
    parser.add_argument(
        "-o", "--output", metavar="FILE", type=Path, help="write here instead of stdout"
    )


def add_session_argument(parser: argparse.ArgumentParser) -> None:
    """Add the SESSION positional argument (a session id, as `chargebook sessions` lists)."""
    parser.add_argument("session", metavar="SESSION", type=int, help="session id")


def _session_key(text: str) -> int | str:
    """Return a session id (a whole number) or a session UUID (lower case), as typed."""
    import uuid

    try:
        return int(text)
    except ValueError:
        pass
    try:
        return str(uuid.UUID(text))
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"SESSION = {text!r} is neither a session id nor a session UUID"
        ) from None


def add_session_or_uuid_argument(parser: argparse.ArgumentParser) -> None:
    """Add SESSION: a session id (as `chargebook sessions` lists) or a session's UUID."""
    parser.add_argument(
        "session",
        metavar="SESSION",
        type=_session_key,
        help="session id, or the session's UUID (unique across stations)",
    )


def _session_id(store: RecordReader, key: int | str) -> int | None:
    """Return the id of the session ``key`` names (an id or a UUID), None when not held."""
    from chargebook.acquire.record.store import NotFound

    if isinstance(key, str):
        return next((row.id for row in store.sessions() if row.uuid == key), None)
    try:
        return store.session(key).id
    except NotFound:
        return None


def add_session_or_visit_arguments(
    parser: argparse.ArgumentParser, *, session_uuid: bool = False
) -> None:
    """Add an optional SESSION (an id; with ``session_uuid``, or a session's UUID) and
    ``--visit ID`` (a calibration visit): one of the two."""
    parser.add_argument(
        "session",
        metavar="SESSION",
        type=_session_key if session_uuid else int,
        nargs="?",
        help="session id, or the session's UUID" if session_uuid else "session id",
    )
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


def run_reader(
    args: argparse.Namespace,
    body: Callable[[RecordReader], int],
    across: Callable[[Sequence[RecordReader]], int] | None = None,
) -> int:
    """Open the station read-only, run ``body`` on it, and turn known failures into words.

    With ``--db postgresql://...`` the department record is read instead: ``body`` runs on
    the one station chosen (``--station``, the only one published, or the one that holds the
    session asked for), or ``across`` on every station's sessions when it is given.

    A missing database, a missing session or bad input exits with status 2, a database that
    cannot be read with 1; each prints one line on stderr saying what is wrong.
    """
    from chargebook.acquire.record.store import StoreError, default_db_path

    if isinstance(args.db, str):
        return _run_department(args, body, across)
    if getattr(args, "station", None) is not None:
        print(
            "chargebook: --station chooses a station of the department record "
            "(--db postgresql://...); a station file holds one station",
            file=sys.stderr,
        )
        return EXIT_INVALID_INPUT
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
        return _answer(lambda: _on_station(args, store, body), f"the station database {store.path}")
    finally:
        store.close()


def _on_station(args: argparse.Namespace, store: Store, body: Callable[[RecordReader], int]) -> int:
    """Run ``body`` on the station file, a session named by UUID turned into its id."""
    from chargebook.acquire.record.store import NotFound

    key = getattr(args, "session", None)
    if isinstance(key, str):
        found = _session_id(store, key)
        if found is None:
            raise NotFound(f"no session with UUID {key} in {store.path}")
        args.session = found
    return body(store)


def _answer(call: Callable[[], int], where: str) -> int:
    """Return ``call()``, or the exit status of a known failure, said in one line on stderr."""
    from chargebook.acquire.record.store import NotFound, UnreadableRecord
    from chargebook.corrections.errors import InputError

    try:
        return call()
    except NotFound as error:
        print(f"chargebook: {error}{listed_hint(error)}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    except InputError as error:
        print(f"chargebook: {error}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    except UnreadableRecord as error:  # a damaged file shows only when its pages are read
        print(
            f"chargebook: {where} cannot be read: {error}; "
            "restore it from a backup (`sqlite3 FILE .recover` may save what is left)",
            file=sys.stderr,
        )
        return EXIT_FAILURE
    except BrokenPipeError:
        return output_closed()


def listed_hint(error: Exception) -> str:
    """Return " (`COMMAND` lists them)" for a NotFound whose kind some command lists."""
    listed_by = getattr(error, "listed_by", None)
    return f" (`{listed_by}` lists them)" if listed_by else ""


def output_closed() -> int:
    """Stop quietly when whoever read the output went away (`| head`), as the Python
    documentation on SIGPIPE advises, so that the interpreter's final flush stays silent."""
    os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
    return EXIT_FAILURE


def _run_department(
    args: argparse.Namespace,
    body: Callable[[RecordReader], int],
    across: Callable[[Sequence[RecordReader]], int] | None,
) -> int:
    """Run a read command on the department record named by ``--db postgresql://...``."""
    from chargebook.acquire.record.department import ReadFailed, open_department
    from chargebook.acquire.record.store import StoreError

    try:
        database = open_department(args.db)
    except StoreError as error:
        print(f"chargebook: {error}", file=sys.stderr)
        return EXIT_FAILURE
    with database:
        try:
            return _answer(
                lambda: _on_stations(args, database, body, across),
                f"the department record {database.where}",
            )
        except ReadFailed as error:
            print(f"chargebook: {error}", file=sys.stderr)
            return EXIT_FAILURE


def _on_stations(
    args: argparse.Namespace,
    database: DepartmentDatabase,
    body: Callable[[RecordReader], int],
    across: Callable[[Sequence[RecordReader]], int] | None,
) -> int:
    """Run ``body`` on the station meant (``--station``, the only one, or the one holding the
    session asked for, by id or UUID), or ``across`` on them all."""
    from chargebook.acquire.record.department import stations_named
    from chargebook.acquire.record.store import NotFound
    from chargebook.corrections.errors import InputError

    stores = [database.store(station) for station in stations_named(database, args.station)]
    if across is not None:
        return body(stores[0]) if len(stores) == 1 else across(stores)
    key = args.session
    holding = [(store, _session_id(store, key)) for store in stores]
    holding = [(store, found) for store, found in holding if found is not None]
    if len(holding) == 1:
        ((store, args.session),) = holding
        return body(store)
    what = "UUID" if isinstance(key, str) else "id"
    if not holding:
        raise NotFound(f"no session with {what} {key} in {database.where}")
    from chargebook.acquire.record.station_label import station_choices, stations_of

    choices = station_choices(stations_of(stores))
    names = ", ".join(choices[store.station().uuid] for store, _ in holding)
    allowed = f"--station NAME (one of {names}) or the session's UUID"
    raise InputError("session", key, allowed, "is recorded at several stations")


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
