"""`chargebook export SESSION [--format json|csv|html]`: one recorded session, for keeping."""

from __future__ import annotations

import argparse

from chargebook.acquire.commands.station_reader import (
    add_output_argument,
    add_record_argument,
    add_session_or_visit_arguments,
    require_session_or_visit,
    run_reader,
)

TYPE_CHECKING = False  # not typing's: `chargebook --help` imports no typing (DEVELOPERS.md)
if TYPE_CHECKING:
    from chargebook.acquire.record.reader import RecordReader

HELP = (
    "export one recorded session: csv (the readings), json (everything) or html "
    "(a self-contained printable report); with --visit, a calibration visit (json or html)"
)

FORMATS = ("csv", "json", "html")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_session_or_visit_arguments(parser, session_uuid=True)
    parser.add_argument(
        "--format", choices=FORMATS, default="json", help="the export format (default: json)"
    )
    add_output_argument(parser)
    parser.add_argument(
        "--traffic", action="store_true", help="json: include the raw instrument lines"
    )
    add_record_argument(parser)


def run(args: argparse.Namespace) -> int:
    return run_reader(args, lambda store: _export(store, args))


def _export(store: RecordReader, args: argparse.Namespace) -> int:
    from chargebook.acquire.commands.station_reader import write_output
    from chargebook.acquire.reports import export
    from chargebook.acquire.reports.data import load_record

    require_session_or_visit(args)
    if args.visit is not None:
        return write_output(export.visit_text(store, args.visit, args.format), args.output)
    record = load_record(store, args.session)
    warning = record.integrity_warning()
    if warning is not None:  # in every format on stderr; json and html carry it too
        import sys

        from chargebook.acquire.reports.text import printable

        print(f"chargebook: {printable(warning)}", file=sys.stderr)
    if args.format == "csv":
        text = export.to_csv(record)
    elif args.format == "json":
        text = export.to_json(record, store, include_traffic=args.traffic)
    else:
        text = export.to_html(record)
    return write_output(text, args.output)
