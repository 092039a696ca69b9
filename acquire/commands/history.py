"""`chargebook history --beam NAME`: dose per MU of one beam by session, against a baseline."""

from __future__ import annotations

import argparse
from pathlib import Path

from chargebook.acquire.report_cli import add_db_argument, run_reader

HELP = (
    "list dose per MU of one beam by session with its deviation from a baseline and the "
    "tolerance band, and plot it"
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--beam", metavar="NAME", required=True, help='the beam, e.g. "6 MV"')
    parser.add_argument("--machine", metavar="NAME", help="only this treatment machine")
    parser.add_argument(
        "--baseline",
        default="expected",
        help="expected (each session's expected output, the default), first, mean, "
        "session:ID, or a dose per MU in cGy/MU",
    )
    parser.add_argument(
        "--all",
        action="store_true",
        help="include open, interrupted and aborted sessions and replays",
    )
    parser.add_argument("--json", action="store_true", help="print JSON instead of a table")
    parser.add_argument("--html", metavar="FILE", type=Path, help="also write an HTML report")
    parser.add_argument("--no-plot", action="store_true", help="leave out the terminal plot")
    add_db_argument(parser)


def run(args: argparse.Namespace) -> int:
    return run_reader(args, lambda store: _history(store, args))


def _history(store, args: argparse.Namespace) -> int:
    import json

    from chargebook.acquire.cli import CAUTION, EXIT_OK
    from chargebook.acquire.export import chargebook_version, generated_at
    from chargebook.acquire.history import history_table, load_history
    from chargebook.acquire.report_cli import write_output
    from chargebook.acquire.report_data import plain
    from chargebook.acquire.report_html import history_html
    from chargebook.acquire.report_text import deviation_plot, table_text

    history = load_history(store, args.beam, args.machine, args.baseline, args.all)
    table = history_table(history)
    if args.html is not None:
        stamp = f"Generated {generated_at()} by chargebook {chargebook_version()}."
        status = write_output(history_html(history, table, stamp), args.html)
        if status != EXIT_OK:
            return status
    if args.json:
        print(json.dumps(plain(history), indent=2, ensure_ascii=False, allow_nan=False))
        return EXIT_OK
    print(table_text(table))
    if history.points and history.tolerance_pct is not None and not args.no_plot:
        print()
        print(
            deviation_plot(
                [p.deviation_pct for p in history.points],
                history.tolerance_pct,
                [str(p.session_id) for p in history.points],
            )
        )
    print()
    print(CAUTION)
    return EXIT_OK
