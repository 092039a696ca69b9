"""`chargebook sessions`: list the sessions recorded in the station database."""

from __future__ import annotations

import argparse

from chargebook.acquire.commands.station_reader import add_record_argument, run_reader

TYPE_CHECKING = False  # not typing's: `chargebook --help` imports no typing (DEVELOPERS.md)
if TYPE_CHECKING:
    from collections.abc import Sequence

    from chargebook.acquire.record.reader import RecordReader

HELP = (
    "list the recorded sessions: id, date, status, review, machine, beam, operator, readings, "
    "and the calibration visit a session measured a beam of"
)

STATUSES = ("open", "finished", "aborted", "interrupted")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_record_argument(parser)
    parser.add_argument("--status", choices=STATUSES, help="only sessions with this status")
    parser.add_argument("--beam", metavar="NAME", help='only this beam, e.g. "6 MV"')
    parser.add_argument("--machine", metavar="NAME", help="only this treatment machine")
    parser.add_argument("--json", action="store_true", help="print JSON instead of a table")


def run(args: argparse.Namespace) -> int:
    return run_reader(
        args,
        lambda store: _print(_rows(store, args), args, by_station=False),
        across=lambda stores: _print(_across(stores, args), args, by_station=True),
    )


def _across(stores: Sequence[RecordReader], args: argparse.Namespace) -> list[dict]:
    """Return the sessions of every station, in the order they started."""
    rows = [row for store in stores for row in _rows(store, args)]
    return sorted(rows, key=lambda row: row["created_at"])


def _rows(store: RecordReader, args: argparse.Namespace) -> list[dict]:
    """Return the station's sessions that match the filters, as the JSON output lists them."""
    from chargebook.acquire.record.events import EventKind
    from chargebook.acquire.record.review import review_of, review_status
    from chargebook.acquire.reports.session_filter import matches

    station = store.station()
    set_counts, reading_counts = store.set_counts(), store.reading_counts()
    reviews = store.events_of_kind(EventKind.SESSION_REVIEWED)
    visits = store.session_visits()
    rows = []
    for session in store.listed_sessions():  # its names read, its metadata not decoded
        if args.status and session.status != args.status:
            continue
        meta = session.names
        meta = _decoded_metadata(store, session.id) if meta is None else meta
        if not matches(session, args.beam, args.machine, meta):
            continue
        sets, accepted = set_counts.get(session.id, (0, 0))
        review = review_of(reviews.get(session.id, []))
        visit_id, beam_position = visits.get(session.id, (None, None))
        rows.append(
            {
                "id": session.id,
                "uuid": session.uuid,
                "station_uuid": station.uuid,
                "station_name": station.name,
                "created_at": session.created_at,
                "status": session.status,
                "treatment_machine": meta.get("treatment_machine"),
                "beam": meta.get("beam", session.beam),
                "operator": meta.get("operator"),
                "convention": session.convention,
                "sets_accepted": accepted,
                "sets": sets,
                "readings": reading_counts.get(session.id, 0),
                "replay_of": session.replay_of,
                "visit_id": visit_id,
                "visit_beam": beam_position,
                "review": review_status(review),
                "reviewer": review.reviewer if review else None,
                "self_review": review.self_review if review else None,
                "reviewed_at": review.reviewed_at if review else None,
            }
        )
    return rows


def _decoded_metadata(store: RecordReader, session_id: int) -> dict:
    """Return a session's decoded metadata; {} when it is not a JSON object (listed without
    its names, and said on stderr: the rest of the listing is still shown)."""
    import sys

    try:
        meta = store.session(session_id).metadata()
    except ValueError:  # json.JSONDecodeError
        meta = None
    if isinstance(meta, dict):
        return meta
    print(
        f"chargebook: session {session_id}: its stored metadata is not a JSON object, so it "
        f"is listed without machine, beam or operator (`chargebook verify {session_id}` checks "
        "its record)",
        file=sys.stderr,
    )
    return {}


def _print(rows: list[dict], args: argparse.Namespace, *, by_station: bool) -> int:
    """Print the sessions as JSON or as a table (with their station when from several)."""
    import json

    from chargebook.acquire.exit_codes import EXIT_OK
    from chargebook.acquire.record.station_label import station_labels
    from chargebook.acquire.reports.table import Table, when
    from chargebook.acquire.reports.text import table_text

    if args.json:
        print(json.dumps(rows, indent=2, ensure_ascii=False))
        return EXIT_OK
    station = ("station",) if by_station else ()
    labels = station_labels((r["station_uuid"], r["station_name"]) for r in rows)
    # The visit column only when a listed session measured a beam of a calibration visit: a
    # station that records no visits keeps the listing as narrow as it was.
    visit = ("visit",) if any(r["visit_id"] is not None for r in rows) else ()
    table = Table(
        "Sessions",
        (
            *station,
            "id",
            "started",
            "status",
            "review",
            "machine",
            "beam",
            "operator",
            "sets",
            "readings",
            "replay of",
            *visit,
        ),
        tuple(
            (
                *((labels[r["station_uuid"]],) if by_station else ()),
                str(r["id"]),
                when(r["created_at"]),
                r["status"],
                str(r["review"]) if r["reviewer"] is None else _review_cell(r),
                str(r["treatment_machine"] or "—"),
                str(r["beam"] or "—"),
                str(r["operator"] or "—"),
                f"{r['sets_accepted']}/{r['sets']} accepted",
                str(r["readings"]),
                "" if r["replay_of"] is None else str(r["replay_of"]),
                *((_visit_cell(r),) if visit else ()),
            )
            for r in rows
        ),
        note="" if rows else "No session matches.",
    )
    print(table_text(table, title=False))
    return EXIT_OK


def _visit_cell(row: dict) -> str:
    """Return the visit column: the visit's id and the beam's position in it, or nothing."""
    if row["visit_id"] is None:
        return ""
    return f"{row['visit_id']}, beam {row['visit_beam']}"


def _review_cell(row: dict) -> str:
    """Return the review column of a reviewed session: the decision, reviewer and date."""
    from chargebook.acquire.record.review import SELF_REVIEW_WORDS

    mark = f" {SELF_REVIEW_WORDS}" if row["self_review"] else ""
    return f"{row['review']} by {row['reviewer']}{mark} {str(row['reviewed_at'])[:10]}"
