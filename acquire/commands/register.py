"""`chargebook register ...`: the station's registers of machines and beams, chambers and their
certificates, electrometers, thermometers, barometers and k_Q.

``list`` and ``show`` read the station file; ``add`` and ``supersede`` write through the daemon
when one holds the file (it is the single writer while it runs), else directly while holding
the station lock. ``fields KIND`` lists what a row of that kind holds.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from chargebook.acquire.commands.station_reader import add_db_argument
from chargebook.acquire.commands.station_writer import (
    add_socket_argument,
    ask_daemon,
    write_station,
)

TYPE_CHECKING = False  # not typing's: `chargebook --help` imports no typing (DEVELOPERS.md)
if TYPE_CHECKING:
    from typing import Any

HELP = (
    "the station's registers: machines and beams, chambers and their certificates, "
    "electrometers, thermometers, barometers, k_Q (list, show, add, supersede, fields)"
)


def _json_flag(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--json", action="store_true", help="print JSON instead of words")


def _write_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "values",
        nargs="*",
        metavar="FIELD=VALUE",
        help="the row's fields (`chargebook register fields KIND` lists them)",
    )
    parser.add_argument(
        "--effective", metavar="YYYY-MM-DD", help="the day the row holds from (default: today)"
    )
    parser.add_argument(
        "--actor", metavar="NAME", help="who makes the change (default: your Unix account)"
    )
    add_socket_argument(parser)
    add_db_argument(parser)
    _json_flag(parser)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    from chargebook.acquire.protocol import REGISTER_KINDS as KINDS

    actions = parser.add_subparsers(dest="action", metavar="ACTION", required=True)
    listing = actions.add_parser("list", help="list the current rows (of one kind)")
    listing.add_argument("--kind", choices=KINDS, help="only rows of this kind")
    listing.add_argument("--all", action="store_true", help="superseded rows too")
    add_db_argument(listing)
    _json_flag(listing)
    show = actions.add_parser("show", help="show one row and the history of its entry")
    show.add_argument("row", metavar="ROW", type=int, help="row id, as `register list` shows")
    add_db_argument(show)
    _json_flag(show)
    adding = actions.add_parser("add", help="add an entry: KIND FIELD=VALUE ...")
    adding.add_argument("kind", metavar="KIND", choices=KINDS, help=", ".join(KINDS))
    _write_options(adding)
    superseding = actions.add_parser(
        "supersede", help="replace a row with its fields changed: ROW FIELD=VALUE ... --reason"
    )
    superseding.add_argument("row", metavar="ROW", type=int, help="the entry's current row")
    superseding.add_argument("--reason", metavar="TEXT", required=True, help="why, in words")
    _write_options(superseding)
    listing_fields = actions.add_parser("fields", help="list the fields of a kind of row")
    listing_fields.add_argument("kind", metavar="KIND", choices=KINDS, help=", ".join(KINDS))


def run(args: argparse.Namespace) -> int:
    """Carry out one register action; return the exit status."""
    from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT, EXIT_OK

    if args.action == "fields":
        from chargebook.acquire.session.register_rows import fields_help

        print(f"fields of a {args.kind} row:\n{fields_help(args.kind)}")
        return EXIT_OK
    if args.action in ("list", "show"):
        from chargebook.acquire.commands.station_reader import run_reader

        return run_reader(args, lambda store: _read(args, store))
    try:
        given = _pairs(args.values)
    except ValueError as error:
        print(f"chargebook: {error}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    return _write(args, given)


def _pairs(values: list[str]) -> dict[str, str]:
    """Return FIELD=VALUE arguments as a dict; ValueError naming one without '='."""
    given: dict[str, str] = {}
    for value in values:
        name, equals, text = value.partition("=")
        if not equals or not name.strip():
            raise ValueError(f"{value!r} is not FIELD=VALUE (e.g. serial=SIM-CH-0001)")
        given[name.strip()] = text
    return given


def _read(args: argparse.Namespace, store: Any) -> int:
    import json

    from chargebook.acquire.exit_codes import EXIT_OK
    from chargebook.acquire.record.registers import entry_rows, register_row, register_rows
    from chargebook.acquire.session.register_requests import named

    if args.action == "list":
        rows = [
            named(store, row)
            for row in register_rows(store, args.kind, include_superseded=args.all)
        ]
        if args.json:
            print(json.dumps({"rows": rows}, ensure_ascii=False, indent=2))
        else:
            print("\n".join(_line(row) for row in rows) or "no register rows")
        return EXIT_OK
    row = register_row(store, args.row)
    history = [named(store, each) for each in entry_rows(store, row.entry_id)]
    if args.json:
        print(
            json.dumps({"row": named(store, row), "entry": history}, ensure_ascii=False, indent=2)
        )
        return EXIT_OK
    shown = named(store, row)
    print(_line(shown))
    for key, value in sorted(shown["fields"].items()):
        print(f"  {key:<22} {value}")
    print("entry history:")
    for each in history:
        print(f"  {_line(each)}")
    return EXIT_OK


def _line(row: dict[str, Any]) -> str:
    """Return one row in words: id, kind, name, dates, and what superseded it."""
    state = f", superseded by row {row['superseded_by']}" if row["superseded_by"] else ""
    return (
        f"row {row['id']:>4}  {row['kind']:<12} {row['name']}  "
        f"(from {row['effective_from']}, recorded {row['recorded_at'][:16]}{state})"
    )


def _write(args: argparse.Namespace, given: dict[str, str]) -> int:
    """Add or supersede through the daemon that holds the station file, else directly."""
    from chargebook.acquire.record.store import default_db_path

    path = Path(args.db or default_db_path()).expanduser()
    return write_station(
        path,
        lambda: _directly(args, path, given),
        lambda: _through_daemon(args, path, given),
        must_exist=args.action == "supersede",
    )


def _actor(args: argparse.Namespace) -> str:
    from chargebook.acquire.record.review import local_account

    actor: str | None = args.actor or local_account()
    return actor or "unknown account"


def _directly(args: argparse.Namespace, path: Path, given: dict[str, str]) -> int:
    """Write the row with the store (no daemon holds the file; this process holds its lock)."""
    from chargebook.acquire.record.review import local_account
    from chargebook.acquire.record.store import Store
    from chargebook.acquire.session.register_requests import named
    from chargebook.acquire.session.register_rows import add_row, supersede_row

    with Store.open(path) as store, store.on_behalf_of(local_account()):
        if args.action == "add":
            row = add_row(
                store, args.kind, given, actor=_actor(args), effective_from=args.effective
            )
        else:
            row = supersede_row(
                store,
                args.row,
                given,
                actor=_actor(args),
                reason=args.reason,
                effective_from=args.effective,
            )
        return _report(args, named(store, row), f"recorded in {path}")


def _report(args: argparse.Namespace, row: dict[str, Any], where: str) -> int:
    import json

    from chargebook.acquire.exit_codes import EXIT_OK

    if args.json:
        print(json.dumps(row, ensure_ascii=False, indent=2))
    else:
        print(f"{_line(row)}: {where}")
    return EXIT_OK


def _through_daemon(args: argparse.Namespace, path: Path, given: dict[str, str]) -> int:
    """Ask the daemon that holds the station file to write the row."""
    from chargebook.acquire import protocol
    from chargebook.acquire.exit_codes import EXIT_OK

    params: dict[str, Any] = {"fields": given, "db": str(path.resolve())}
    if args.effective:
        params["effective_from"] = args.effective
    if args.action == "add":
        method = protocol.Method.REGISTER_ADD
        params["kind"] = args.kind
    else:
        method = protocol.Method.REGISTER_SUPERSEDE
        params |= {"row": args.row, "reason": args.reason}
    status, row = ask_daemon(
        path, args.socket, client="register", operator=_actor(args), method=method,
        params=params, what="row",
    )  # fmt: skip
    if status != EXIT_OK:
        return status
    return _report(args, row, f"recorded by the daemon that holds {path}")
