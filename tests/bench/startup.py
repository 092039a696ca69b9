"""Benchmark: how long `chargebook --help` takes, against the interpreter starting and stopping.

    python -m tests.bench.startup [--smoke]

* Baseline: ``python -c pass`` with the interpreter chargebook is installed in (site packages
  and the editable install's import hooks included, as every Python start pays them).
* Measured: ``chargebook --help``, the installed console script (or, where there is none,
  ``python -m chargebook --help``): the parser with every subcommand.

Runs alternate; the median wall time of each is compared. Target (issue 17, target 7): at
most 2 times.

Both commands run with Python's byte-code cache written and read (``PYTHONDONTWRITEBYTECODE``
is cleared for them, and a first run fills the cache), as an installed chargebook has it: with
the variable set, every run would compile chargebook's modules from source again, a cost no
user of an installed copy pays.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

from tests.bench import report

FULL_RUNS = 21
SMOKE_RUNS = 3
TARGET_RATIO = 2.0


def chargebook_help_command() -> list[str]:
    """Return the command line of `chargebook --help` next to this interpreter."""
    script = shutil.which("chargebook", path=str(Path(sys.executable).parent))
    if script is not None:
        return [script, "--help"]
    return [sys.executable, "-m", "chargebook", "--help"]


def cached_bytecode_environment() -> dict[str, str]:
    """Return this process's environment without ``PYTHONDONTWRITEBYTECODE``."""
    return {name: value for name, value in os.environ.items() if name != "PYTHONDONTWRITEBYTECODE"}


def wall_s(command: list[str]) -> float:
    """Return the wall time of one run of ``command``, in seconds (it must succeed)."""
    environment = cached_bytecode_environment()
    started = time.perf_counter()
    subprocess.run(
        command,
        check=True,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        env=environment,
    )
    return time.perf_counter() - started


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    runs = SMOKE_RUNS if args.smoke else FULL_RUNS
    out = report.Report(f"startup: {runs} alternating runs of each command", args.smoke)
    baseline_command = [sys.executable, "-c", "pass"]
    measured_command = chargebook_help_command()
    out.note("measured command: " + " ".join(measured_command))
    out.note("byte-code cache: written and read (PYTHONDONTWRITEBYTECODE cleared)")
    wall_s(measured_command)  # warm the file and byte-code caches: later runs find them filled
    baseline_s, measured_s = [], []
    for _ in range(runs):
        baseline_s.append(wall_s(baseline_command))
        measured_s.append(wall_s(measured_command))
    baseline, measured = report.median(baseline_s), report.median(measured_s)
    out.baseline("python -c pass (median)", baseline * 1000, "ms")
    out.measured("chargebook --help (median)", measured * 1000, "ms")
    ratio = measured / baseline
    out.ratio(ratio, "measured / baseline")
    out.target(
        f"ratio <= {TARGET_RATIO:g}", ratio <= TARGET_RATIO, f"{ratio / TARGET_RATIO - 1:.0%} over"
    )
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
