"""`chargebook review SESSION`: a second person approves or rejects a closed session."""

from __future__ import annotations

import argparse
from pathlib import Path

from chargebook.acquire.commands.station_reader import add_db_argument, add_session_argument
from chargebook.acquire.commands.station_writer import (
    add_socket_argument,
    ask_daemon,
    write_station,
)

HELP = (
    "review a finished or aborted session as a second person: approve or reject it with a "
    "comment, recorded in its audit with who and when"
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_session_argument(parser)
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
    add_socket_argument(parser)


def run(args: argparse.Namespace) -> int:
    """Record the review through the daemon that holds the station file, else directly."""
    from chargebook.acquire.record.store import default_db_path

    path = Path(args.db or default_db_path()).expanduser()
    return write_station(path, lambda: _directly(args, path), lambda: _through_daemon(args, path))


def _directly(args: argparse.Namespace, path: Path) -> int:
    """Write the review with the store (no daemon holds the file; this process holds its lock)."""
    from chargebook.acquire.exit_codes import EXIT_OK
    from chargebook.acquire.record.review import local_account, record_review, review_words
    from chargebook.acquire.record.store import Store

    with Store.open(path) as store, store.on_behalf_of(local_account()):
        review = record_review(
            store,
            args.session,
            args.decision,
            args.reviewer,
            args.comment,
            allow_self_review=args.allow_self_review,
        )
    print(f"session {args.session} {review_words(review)}: recorded in {path}")
    return EXIT_OK


def _through_daemon(args: argparse.Namespace, path: Path) -> int:
    """Ask the daemon that holds the station file to record the review (``session.review``)."""
    from chargebook.acquire import protocol
    from chargebook.acquire.exit_codes import EXIT_OK
    from chargebook.acquire.record.review import Review, review_words

    status, review = ask_daemon(
        path,
        args.socket,
        client="review",
        operator=args.reviewer,
        method=protocol.Method.SESSION_REVIEW,
        params={
            "session": args.session,
            "decision": args.decision,
            "reviewer": args.reviewer,
            "comment": args.comment,
            "allow_self_review": args.allow_self_review,
            "db": str(path.resolve()),
        },
        what="review",
    )
    if status != EXIT_OK:
        return status
    words = review_words(Review(**review))
    print(f"session {args.session} {words}: recorded by the daemon that holds {path}")
    return EXIT_OK
