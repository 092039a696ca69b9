"""`chargebook show SESSION`: one recorded session, its results recomputed from raw values."""

from __future__ import annotations

import argparse

from chargebook.acquire.commands.station_reader import (
    add_record_argument,
    add_session_or_visit_arguments,
    require_session_or_visit,
    run_reader,
)

TYPE_CHECKING = False  # not typing's: `chargebook --help` imports no typing (DEVELOPERS.md)
if TYPE_CHECKING:
    from chargebook.acquire.record.reader import RecordReader

HELP = (
    "show one recorded session: metadata, environment, reading sets, factors, results, "
    "uncertainty budget, flags and audit; or, with --visit, a calibration visit's result by beam"
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_session_or_visit_arguments(parser, session_uuid=True)
    add_record_argument(parser)
    parser.add_argument("--json", action="store_true", help="print the JSON export instead of text")


def run(args: argparse.Namespace) -> int:
    return run_reader(args, lambda store: _show(store, args))


def _show(store: RecordReader, args: argparse.Namespace) -> int:
    import shutil
    import textwrap

    from chargebook.acquire.exit_codes import EXIT_OK
    from chargebook.acquire.protocol import CAUTION
    from chargebook.acquire.reports.data import load_record
    from chargebook.acquire.reports.export import to_json
    from chargebook.acquire.reports.sections import all_sections
    from chargebook.acquire.reports.text import printable, tables_text

    require_session_or_visit(args)
    if args.visit is not None:
        return _show_visit(store, args)
    record = load_record(store, args.session)
    if args.json:
        print(to_json(record), end="")
    else:
        # Wrapped to the terminal (or $COLUMNS); piped to a file or grep, lines stay whole.
        columns = shutil.get_terminal_size((0, 0)).columns
        warning = record.integrity_warning()
        if warning is not None:
            shown = printable(warning)
            print((textwrap.fill(shown, columns) if columns else shown) + "\n")
        print(tables_text(all_sections(record), width=columns or None))
        print()
        print(textwrap.fill(CAUTION, columns) if columns else CAUTION)
    return EXIT_OK


def _show_visit(store, args: argparse.Namespace) -> int:
    import json
    import shutil

    from chargebook.acquire.exit_codes import EXIT_OK
    from chargebook.acquire.protocol import CAUTION
    from chargebook.acquire.reports.text import tables_text
    from chargebook.acquire.reports.visit import load_visit, visit_tables

    summary, events = load_visit(store, args.visit)
    if args.json:
        print(json.dumps(summary.to_dict(), indent=2, ensure_ascii=False))
        return EXIT_OK
    columns = shutil.get_terminal_size((0, 0)).columns
    print(tables_text(visit_tables(summary, events), width=columns or None))
    print()
    print(CAUTION)
    return EXIT_OK
