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
import os
import sys
from collections.abc import Callable, Sequence

from chargebook import CAUTION
from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT, EXIT_OK, EXIT_STATUS_HELP

TYPE_CHECKING = False  # not typing's: `chargebook --help` imports no typing (DEVELOPERS.md)
if TYPE_CHECKING:
    from typing import Any

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


def _terminal_columns() -> int:
    """Return the terminal's width in columns, as ``shutil.get_terminal_size`` reckons it.

    ``COLUMNS`` if it is a positive number, else the width of standard output's terminal, else
    80. (argparse asks shutil, whose import costs `--help` some 3 ms of its start-up.)
    """
    try:
        columns = int(os.environ["COLUMNS"])
    except (KeyError, ValueError):
        columns = 0
    if columns <= 0:
        try:
            columns = os.get_terminal_size(sys.__stdout__.fileno()).columns  # type: ignore[union-attr]
        except (AttributeError, ValueError, OSError):
            columns = 0
    return columns if columns > 0 else 80


class _HelpFormatter(argparse.HelpFormatter):
    """argparse's help formatter, told the terminal's width by :func:`_terminal_columns`."""

    def __init__(
        self,
        prog: str,
        indent_increment: int = 2,
        max_help_position: int = 24,
        width: int | None = None,
    ) -> None:
        if width is None:
            width = _terminal_columns() - 2  # argparse's own margin
        super().__init__(prog, indent_increment, max_help_position, width)


class _CommandParser(argparse.ArgumentParser):
    """A subcommand's parser that adds the subcommand's arguments only when it is first used.

    `chargebook --help` and `chargebook COMMAND ...` then pay for one command's arguments at
    most, not for every command's (issue 17: `--help` within 2 x a bare interpreter's start).
    """

    def __init__(
        self,
        *args: Any,
        add_arguments: Callable[[argparse.ArgumentParser], None] | None = None,
        **kwargs: Any,
    ) -> None:
        kwargs.setdefault("formatter_class", _HelpFormatter)
        super().__init__(*args, **kwargs)
        self._add_arguments = add_arguments

    def populate(self) -> None:
        """Add the subcommand's arguments, once."""
        add_arguments, self._add_arguments = self._add_arguments, None
        if add_arguments is not None:
            add_arguments(self)

    def parse_known_args(self, args: Any = None, namespace: Any = None) -> Any:
        self.populate()
        return super().parse_known_args(args, namespace)

    def format_usage(self) -> str:
        self.populate()
        return super().format_usage()

    def format_help(self) -> str:
        self.populate()
        return super().format_help()


def build_parser(*, every_command: bool = False) -> argparse.ArgumentParser:
    """Return the argument parser with every subcommand that is installed.

    A subcommand's own arguments are added when it is chosen or its help is asked for, unless
    ``every_command`` (a completion script walks every command's options).
    """
    parser = argparse.ArgumentParser(
        prog="chargebook",
        description="Electrometer data acquisition and charge-to-dose corrections for "
        "reference dosimetry of radiotherapy beams.",
        epilog=f"{EXIT_STATUS_HELP}. {CAUTION}",
        formatter_class=_HelpFormatter,
    )
    parser.add_argument("--version", action=_VersionAction)
    subparsers = parser.add_subparsers(
        dest="command", metavar="COMMAND", parser_class=_CommandParser
    )
    for name, module_name in COMMANDS.items():
        try:
            module = _load(module_name)
        except ModuleNotFoundError as error:
            if error.name != f"chargebook.acquire.commands.{module_name}":
                raise
            continue
        sub = subparsers.add_parser(
            name,
            help=module.HELP,
            description=module.HELP,
            epilog=EXIT_STATUS_HELP,
            add_arguments=module.add_arguments,
        )
        sub.set_defaults(_run=module.run)
        if every_command:
            sub.populate()
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
