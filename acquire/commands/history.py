"""`chargebook history --beam NAME`: dose per MU of one beam by session, against a baseline."""

from __future__ import annotations

import argparse
from pathlib import Path

from chargebook.acquire.commands.station_reader import add_record_argument, run_reader

TYPE_CHECKING = False  # not typing's: `chargebook --help` imports no typing (DEVELOPERS.md)
if TYPE_CHECKING:
    from collections.abc import Sequence

    from chargebook.acquire.record.reader import RecordReader

FORMATS = ("text", "json", "html")

HELP = (
    "list dose per MU of one beam by session with its deviation from a baseline and the "
    "tolerance band, and plot it"
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--beam",
        metavar="NAME",
        required=True,
        help='the beam: its name in the registers ("DEMO-LA1 6 MV", "6MV") or its row id, or '
        'as typed in sessions ("6 MV"); close matches are listed when none matches',
    )
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
        help="include open, interrupted and aborted sessions, replays and sessions rejected "
        "by a review (marked rejected)",
    )
    parser.add_argument(
        "--format",
        choices=FORMATS,
        default="text",
        help="text (a table and a plot, the default), json, or html (a printable report)",
    )
    parser.add_argument("--json", action="store_true", help="the same as --format json")
    parser.add_argument(
        "-o", "--output", metavar="FILE", type=Path, help="write here instead of stdout"
    )
    # Before -o existed: `--html FILE` is `--format html -o FILE`, kept for one release.
    parser.add_argument("--html", metavar="FILE", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--no-plot", action="store_true", help="leave out the terminal plot")
    add_record_argument(parser)


def run(args: argparse.Namespace) -> int:
    return run_reader(
        args, lambda store: _history([store], args), across=lambda stores: _history(stores, args)
    )


def _history(stores: Sequence[RecordReader], args: argparse.Namespace) -> int:
    import json
    import sys

    from chargebook.acquire.commands.station_reader import write_output
    from chargebook.acquire.protocol import CAUTION
    from chargebook.acquire.reports.history import (
        history_table,
        load_history_across,
        plot_labels,
    )
    from chargebook.acquire.reports.text import deviation_plot, table_text

    history = load_history_across(stores, args.beam, args.machine, args.baseline, args.all)
    table = history_table(history)
    output_format, output = args.format, args.output
    if args.json:
        output_format = "json"
    if args.html is not None:
        print("chargebook history: --html FILE is now --format html -o FILE", file=sys.stderr)
        output_format, output = "html", args.html
    if output_format == "html":  # the HTML and JSON writers are imported only when asked for
        from chargebook.acquire.reports.export import chargebook_version, generated_at
        from chargebook.acquire.reports.html import history_html

        stamp = f"Generated {generated_at()} by chargebook {chargebook_version()}."
        return write_output(history_html(history, table, stamp), output)
    if output_format == "json":
        from chargebook.acquire.reports.data import plain

        text = json.dumps(plain(history), indent=2, ensure_ascii=False, allow_nan=False) + "\n"
        return write_output(text, output)
    parts = [table_text(table)]
    if history.points and history.tolerance_pct is not None and not args.no_plot:
        labels, legend = plot_labels(history)
        plot = deviation_plot(
            [p.deviation_pct for p in history.points],
            history.tolerance_pct,
            labels,
            uncertainties_pct=[p.U_expanded_pct for p in history.points],
            action_pct=history.action_pct,
            dates=[p.created_at[5:10] for p in history.points],
        )
        parts.append(plot if legend is None else f"{plot}\n{legend}")
    parts.append(CAUTION)
    return write_output("\n\n".join(parts) + "\n", output)
