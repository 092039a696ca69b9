"""What the commands that write to a station file (review, register) share: the daemon is the
single writer while it runs, so a command writes directly while holding the station lock when
no daemon holds it, and asks the daemon over its socket when one does.

Light at import: the store, the lock and the client are imported only when a command runs.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable
from pathlib import Path

TYPE_CHECKING = False  # not typing's: `chargebook --help` imports no typing (DEVELOPERS.md)
if TYPE_CHECKING:
    from typing import Any


def add_socket_argument(parser: argparse.ArgumentParser) -> None:
    """Add ``--socket PATH``: the daemon's socket, used when a daemon holds the station file."""
    parser.add_argument(
        "--socket",
        metavar="PATH",
        type=Path,
        help="the daemon's control socket, used when a daemon holds the station file "
        "(default: the daemon's default socket)",
    )


def write_station(
    path: Path,
    directly: Callable[[], int],
    through_daemon: Callable[[], int],
    *,
    must_exist: bool = True,
) -> int:
    """Run ``directly`` while holding the station lock of ``path``, or ``through_daemon`` when a
    daemon holds it; turn bad input and store failures of ``directly`` into words and an exit
    status (nothing is recorded on a refusal). A file at ``path`` that is not a station database
    (empty, schema version 0) is refused before anything is written; a missing one too when
    ``must_exist`` (else ``directly`` creates it)."""
    from chargebook.acquire.commands.station_reader import missing_station_words
    from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT
    from chargebook.acquire.record.station_lock import StationInUse, StationLock
    from chargebook.acquire.record.store import NotAStation, NotFound, StoreError, require_station
    from chargebook.corrections.errors import InputError

    if must_exist and not path.is_file():
        print(f"chargebook: {missing_station_words(path)}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    if path.is_file():  # never turn a file that is not a station database into one
        try:
            require_station(path)
        except StoreError as error:  # NotAStation: bad input; unreadable: a failure
            print(f"chargebook: {error}", file=sys.stderr)
            return EXIT_INVALID_INPUT if isinstance(error, NotAStation) else EXIT_FAILURE
    lock = StationLock(path)
    try:
        lock.acquire()  # held while writing: no daemon starts on the file meanwhile
    except StationInUse:
        return through_daemon()
    except OSError as error:
        print(f"chargebook: cannot lock {path}: {error.strerror}", file=sys.stderr)
        return EXIT_FAILURE
    try:
        return directly()
    except (InputError, NotFound) as error:
        print(f"chargebook: {error}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    except StoreError as error:
        print(f"chargebook: {error}", file=sys.stderr)
        return EXIT_FAILURE
    finally:
        lock.release()


def ask_daemon(
    path: Path,
    socket: Path | None,
    *,
    client: str,
    operator: str,
    method: str,
    params: dict[str, Any],
    what: str,
) -> tuple[int, Any]:
    """Send one request to the daemon that holds ``path``; return (exit status, its result or
    None). A refusal or an unreachable socket is said in words naming ``what`` was asked."""
    import asyncio

    from chargebook.acquire import protocol
    from chargebook.acquire.client import ConnectionLost, DaemonClient, DaemonError
    from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK

    socket_path = socket or protocol.default_socket_path()

    async def call() -> Any:
        async with await DaemonClient.connect(
            socket_path, client=client, operator=operator
        ) as connection:
            return await connection.call(method, **params)

    try:
        return EXIT_OK, asyncio.run(call())
    except DaemonError as error:
        print(f"chargebook: the daemon refused the {what}: {error.message}", file=sys.stderr)
        input_codes = (protocol.INPUT_ERROR, protocol.INVALID_PARAMS)
        return (EXIT_INVALID_INPUT if error.code in input_codes else EXIT_FAILURE), None
    except (OSError, ConnectionLost) as error:
        print(
            f"chargebook: a daemon holds {path}, so the {what} must go through it, but its "
            f"socket {socket_path} cannot be reached ({error}); pass --socket PATH",
            file=sys.stderr,
        )
        return EXIT_FAILURE, None
