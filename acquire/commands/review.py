"""`chargebook review SESSION` (or `--visit ID`): a second person approves or rejects a closed
session or calibration visit."""

from __future__ import annotations

import argparse
from pathlib import Path

from chargebook.acquire.commands.station_reader import (
    add_db_argument,
    add_session_or_visit_arguments,
)

HELP = (
    "review a finished or aborted session, or a closed calibration visit (--visit), as a second "
    "person: approve or reject it with a comment, recorded in its audit with who and when"
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_session_or_visit_arguments(parser)
    decision = parser.add_mutually_exclusive_group(required=True)
    decision.add_argument(
        "--approve", dest="decision", action="store_const", const="approve", help="approve it"
    )
    decision.add_argument(
        "--reject",
        dest="decision",
        action="store_const",
        const="reject",
        help="reject it (it stays in the record, and out of `history` unless --all)",
    )
    parser.add_argument("--reviewer", metavar="NAME", required=True, help="your name")
    parser.add_argument("--comment", metavar="TEXT", required=True, help="why, in your words")
    parser.add_argument(
        "--allow-self-review",
        action="store_true",
        help="let the operator who measured review the session (refused by default; the "
        "audit records that it was allowed)",
    )
    add_db_argument(parser)
    parser.add_argument(
        "--socket",
        metavar="PATH",
        type=Path,
        help="the daemon's control socket, used when a daemon holds the station file "
        "(default: the daemon's default socket)",
    )


def run(args: argparse.Namespace) -> int:
    """Record the review through the daemon that holds the station file, else directly."""
    import sys

    from chargebook.acquire.commands.station_reader import (
        missing_station_words,
        require_session_or_visit,
    )
    from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT
    from chargebook.acquire.record.station_lock import StationInUse, StationLock
    from chargebook.acquire.record.store import StoreError, default_db_path
    from chargebook.corrections.errors import InputError

    try:
        require_session_or_visit(args)
    except InputError as error:
        print(f"chargebook: {error}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    path = Path(args.db or default_db_path()).expanduser()
    if not path.is_file():
        print(f"chargebook: {missing_station_words(path)}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    lock = StationLock(path)
    try:
        lock.acquire()  # held while writing: no daemon starts on the file meanwhile
    except StationInUse:
        return _through_daemon(args, path)
    except OSError as error:
        print(f"chargebook: cannot lock {path}: {error.strerror}", file=sys.stderr)
        return EXIT_FAILURE
    try:
        return _directly(args, path)
    except InputError as error:
        print(f"chargebook: {error}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    except StoreError as error:
        print(f"chargebook: {error}", file=sys.stderr)
        return EXIT_FAILURE
    finally:
        lock.release()


def _directly(args: argparse.Namespace, path: Path) -> int:
    """Write the review with the store (no daemon holds the file; this process holds its lock)."""
    from chargebook.acquire.exit_codes import EXIT_OK
    from chargebook.acquire.record.review import (
        local_account,
        record_review,
        record_visit_review,
        review_words,
    )
    from chargebook.acquire.record.store import Store

    record = record_review if args.visit is None else record_visit_review
    with Store.open(path) as store, store.on_behalf_of(local_account()):
        review = record(
            store,
            _reviewed(args)[1],
            args.decision,
            args.reviewer,
            args.comment,
            allow_self_review=args.allow_self_review,
        )
    print(f"{_reviewed_words(args)} {review_words(review)}: recorded in {path}")
    return EXIT_OK


def _reviewed(args: argparse.Namespace) -> tuple[str, int]:
    """Return what is reviewed: ("session", id) or ("visit", id)."""
    return ("session", args.session) if args.visit is None else ("visit", args.visit)


def _reviewed_words(args: argparse.Namespace) -> str:
    kind, number = _reviewed(args)
    return f"{kind} {number}"


def _through_daemon(args: argparse.Namespace, path: Path) -> int:
    """Ask the daemon that holds the station file to record the review (``session.review``)."""
    import asyncio
    import sys

    from chargebook.acquire import protocol
    from chargebook.acquire.client import ConnectionLost, DaemonClient, DaemonError
    from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK
    from chargebook.acquire.record.review import Review, review_words

    socket_path = args.socket or protocol.default_socket_path()

    async def call() -> dict:
        async with await DaemonClient.connect(
            socket_path, client="review", operator=args.reviewer
        ) as client:
            kind, number = _reviewed(args)
            method = protocol.Method.SESSION_REVIEW
            if kind == "visit":
                method = protocol.Method.VISIT_REVIEW
            return await client.call(
                method,
                **{kind: number},
                decision=args.decision,
                reviewer=args.reviewer,
                comment=args.comment,
                allow_self_review=args.allow_self_review,
                db=str(path.resolve()),
            )

    try:
        review = asyncio.run(call())
    except DaemonError as error:
        print(f"chargebook: the daemon refused the review: {error.message}", file=sys.stderr)
        input_codes = (protocol.INPUT_ERROR, protocol.INVALID_PARAMS)
        return EXIT_INVALID_INPUT if error.code in input_codes else EXIT_FAILURE
    except (OSError, ConnectionLost) as error:
        print(
            f"chargebook: a daemon holds {path}, so the review must go through it, but its "
            f"socket {socket_path} cannot be reached ({error}); pass --socket PATH",
            file=sys.stderr,
        )
        return EXIT_FAILURE
    words = review_words(Review(**review))
    print(f"{_reviewed_words(args)} {words}: recorded by the daemon that holds {path}")
    return EXIT_OK
