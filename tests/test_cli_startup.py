"""`chargebook --help` stays fast: no command module imports numpy or textual at module level,
and a command's arguments are added only when that command is used."""

from __future__ import annotations

import argparse
import subprocess
import sys

import pytest
from chargebook.acquire.commands.cli import COMMANDS, build_parser

PROBE = """
import sys
from chargebook.acquire.commands.cli import build_parser
parser = build_parser()
parser.format_help()
print(sorted(name for name in ("numpy", "textual", "sqlite_utils", "pyvisa", "serial", "psycopg")
             if name in sys.modules))
"""


def test_help_imports_nothing_heavy() -> None:
    done = subprocess.run([sys.executable, "-c", PROBE], capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"


def test_help_runs_and_lists_correct() -> None:
    done = subprocess.run(
        [sys.executable, "-m", "chargebook", "--help"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert done.returncode == 0, done.stderr
    assert "correct" in done.stdout


def _command_parsers(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    return next(a for a in parser._actions if a.dest == "command").choices


PROBE_ONE_COMMAND = """
import sys
from chargebook.acquire.commands import export
from chargebook.acquire.commands.cli import build_parser
added = []
export.add_arguments = lambda parser, add=export.add_arguments: added.append(add(parser))
try:
    build_parser().parse_args(sys.argv[1:])
except SystemExit:  # --help prints and exits
    pass
print(len(added))
"""


@pytest.mark.parametrize(
    ("argv", "calls"),
    [(["export", "1"], "1"), (["sessions"], "0"), (["--help"], "0"), (["export", "--help"], "1")],
)
def test_only_the_chosen_command_adds_its_arguments(argv: list[str], calls: str) -> None:
    done = subprocess.run(
        [sys.executable, "-c", PROBE_ONE_COMMAND, *argv], capture_output=True, text=True, timeout=60
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.splitlines()[-1] == calls


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_a_command_added_when_chosen_reads_as_one_added_at_once(name: str) -> None:
    lazy, eager = build_parser(), build_parser(every_command=True)
    lazy_command, eager_command = _command_parsers(lazy)[name], _command_parsers(eager)[name]
    assert len(lazy_command._actions) == 1  # -h only, until the command is used
    assert lazy_command.format_help() == eager_command.format_help()
    assert len(lazy_command._actions) == len(eager_command._actions) > 1
