"""The `chargebook` command line: one entry point, one module per subcommand.

Each subcommand lives in `chargebook.acquire.commands.<name>` and provides two things:

    HELP: str                                   one line shown by `chargebook --help`
    def add_arguments(parser: argparse.ArgumentParser) -> None
    def run(args: argparse.Namespace) -> int    the exit status

Command modules import nothing heavy (numpy, textual, sqlite-utils, pyvisa) at module level, so
`chargebook --help` starts fast; they import what they need inside `run`.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT, EXIT_OK, EXIT_STATUS_HELP
from chargebook.acquire.protocol import CAUTION

#: Subcommand name -> module under chargebook.acquire.commands, in the order shown by --help.
COMMANDS: dict[str, str] = {
    "demo": "demo",
    "correct": "correct",
    "serve": "serve",
    "run": "run_unattended",
    "console": "console",
    "simulate": "simulate",
    "ports": "ports",
    "sessions": "sessions",
    "show": "show",
    "export": "export",
    "replay": "replay",
    "history": "history",
    "verify": "verify",
    "review": "review",
    "register": "register",
    "backup": "backup",
    "publish": "publish",
    "completion": "completion",
}


def _load(module_name: str):
    return importlib.import_module(f"chargebook.acquire.commands.{module_name}")


class _VersionAction(argparse.Action):
    """``--version``: print the installed distribution's version, looked up only when asked."""

    def __init__(self, option_strings: Sequence[str], dest: str, **kwargs: object) -> None:
        super().__init__(option_strings, dest, nargs=0, help="print chargebook's version and exit")

    def __call__(self, parser: argparse.ArgumentParser, *_: object) -> None:
        from importlib.metadata import PackageNotFoundError, version

        try:
            installed = version("chargebook")
        except PackageNotFoundError:  # run from a source tree that was never installed
            installed = "unknown (not installed)"
        print(f"chargebook {installed}")
        parser.exit(EXIT_OK)


def build_parser() -> argparse.ArgumentParser:
    """Return the argument parser with every subcommand that is installed."""
    parser = argparse.ArgumentParser(
        prog="chargebook",
        description="Electrometer data acquisition and charge-to-dose corrections for "
        "reference dosimetry of radiotherapy beams.",
        epilog=f"{EXIT_STATUS_HELP}. {CAUTION}",
    )
    parser.add_argument("--version", action=_VersionAction)
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, module_name in COMMANDS.items():
        try:
            module = _load(module_name)
        except ModuleNotFoundError as error:
            if error.name != f"chargebook.acquire.commands.{module_name}":
                raise
            continue
        sub = subparsers.add_parser(
            name, help=module.HELP, description=module.HELP, epilog=EXIT_STATUS_HELP
        )
        module.add_arguments(sub)
        sub.set_defaults(_run=module.run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the `chargebook` command line and return its exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "_run", None) is None:
        parser.print_help(sys.stderr)
        return EXIT_INVALID_INPUT
    try:
        return args._run(args)
    except BrokenPipeError:  # `chargebook correct ... | head`: every command, not only readers
        from chargebook.acquire.commands.station_reader import output_closed

        return output_closed()


if __name__ == "__main__":
    sys.exit(main())
