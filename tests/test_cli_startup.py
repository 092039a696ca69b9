"""`chargebook --help` stays fast: no command module imports numpy or textual at module level."""

from __future__ import annotations

import subprocess
import sys

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
