"""`chargebook verify [SESSION]`: recompute the record's hash chain and say what was changed."""

from __future__ import annotations

import argparse

from chargebook.acquire.commands.station_reader import add_db_argument, run_reader

HELP = (
    "check that the record was not changed: recompute each session's hash chain and name "
    "the row of the table that no longer matches, and each stored session result that no "
    "longer equals a fresh evaluation (exit 0 verified, 1 not, 2 bad input)"
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "session", metavar="SESSION", type=int, nargs="?", help="session id (default: all)"
    )
    add_db_argument(parser)
    parser.add_argument("--json", action="store_true", help="print JSON instead of text")


def run(args: argparse.Namespace) -> int:
    return run_reader(args, lambda store: _verify(store, args))


def _verify(store, args: argparse.Namespace) -> int:
    import json
    from pathlib import Path

    from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_OK
    from chargebook.acquire.record.unrecorded import waiting
    from chargebook.acquire.record.verify import file_damage, verify_all, verify_session
    from chargebook.acquire.session.stored_result import differing_results, missing_results

    damage = file_damage(store)
    one = args.session is not None
    reports = [verify_session(store, args.session)] if one else verify_all(store)
    results = differing_results(store, [args.session] if one else None)
    missing = missing_results(store, [args.session] if one else None)  # a cache: never a fault
    db_path = getattr(store, "path", None)  # a station file (None: the department record)
    set_aside = waiting(store, Path(db_path)) if db_path else []  # never a change
    verified = not damage and not results and all(report.verified for report in reports)
    if args.json:
        data = {
            "verified": verified,
            "file_damage": damage,
            "chains": [report.to_dict() for report in reports],
            "stored_results": results,
            "stored_results_missing": missing,
            "raw_lines_set_aside": set_aside,
        }
        print(json.dumps(data, indent=2))
    else:
        if damage:
            print("the file is damaged (SQLite's quick integrity check):")
            print("\n".join(f"  {line}" for line in damage))
        for report in reports:
            print(report.summary())
        for line in results:
            print(f"STORED RESULT DIFFERS: {line}")
        for line in missing:
            print(f"note: {line}")
        for line in set_aside:
            print(f"RAW LINES NOT YET RECORDED: {line}")
        print("the record verifies" if verified else "THE RECORD DOES NOT VERIFY: see above")
    return EXIT_OK if verified else EXIT_FAILURE
