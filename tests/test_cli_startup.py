"""`chargebook --help` stays fast: no command module imports numpy or textual at module level,
and a command's arguments are added only when that command is used."""

from __future__ import annotations

import argparse
import os
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


PROBE_LIGHT = """
import sys
from chargebook.acquire.commands.cli import main
try:
    main(["--help"])
except SystemExit:
    pass
names = ("typing", "json", "shutil", "chargebook.acquire.protocol")
print(sorted(name for name in names if name in sys.modules))
"""


def test_help_imports_neither_the_protocol_nor_typing_json_or_shutil() -> None:
    # Each costs `chargebook --help` milliseconds of a start-up budget of about 30 (issue 17,
    # target 7: within 2 x `python -c pass`); the caution comes from the package root.
    done = subprocess.run(
        [sys.executable, "-c", PROBE_LIGHT], capture_output=True, text=True, timeout=60
    )
    assert done.returncode == 0, done.stderr
    assert "judgement of a qualified medical physicist" in " ".join(done.stdout.split())
    assert done.stdout.splitlines()[-1] == "[]"


PROBE_WIDTH = """
import argparse
from chargebook.acquire.commands.cli import build_parser
parser = next(a for a in build_parser()._actions if a.dest == "command").choices["export"]
ours = parser.format_help()
parser.formatter_class = argparse.HelpFormatter  # argparse's own, which asks shutil
print(ours == parser.format_help(), max(len(line) for line in ours.splitlines()))
"""


@pytest.mark.parametrize("columns", ["50", "160", "0", "wide"])
def test_help_is_as_wide_as_argparse_would_make_it(columns: str) -> None:
    done = subprocess.run(
        [sys.executable, "-c", PROBE_WIDTH],
        capture_output=True,
        text=True,
        timeout=60,
        env={**os.environ, "COLUMNS": columns},
    )
    assert done.returncode == 0, done.stderr
    same, widest = done.stdout.split()
    assert same == "True"
    # Not a terminal here, so an unusable COLUMNS falls back to 80 (shutil's fallback).
    assert int(widest) > 100 if columns == "160" else int(widest) <= 80


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
