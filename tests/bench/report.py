"""How every benchmark and fault run prints its figures: a few plain lines, the same shape each.

::

    == pipeline: 200000 reading lines flooded on a pty (push-exponent)
    baseline: raw pyserial readline, buffered: 85970 readings/s
    measured: daemon, driver -> engine -> store: 47210 readings/s
    ratio: 0.549 (measured / baseline)
    target: ratio >= 0.5: MET
    target: measured >= 7200 readings/s: MET
    result: MET

A missed target says by how much before its verdict ("target: ratio >= 0.5 (74% of it):
MISSED"). Machines are noisy, so speed is stated as a ratio against a baseline measured in the
same run. The smoke tests read these lines back (``parse``); nothing here judges speed alone.
Exit status of a script: 0 every target met, 1 a target missed (the run itself completed).
"""

from __future__ import annotations

import argparse
import platform
import sys
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime

import psutil

MET, MISSED = "MET", "MISSED"
EXIT_MET, EXIT_MISSED = 0, 1


def parser(description: str) -> argparse.ArgumentParser:
    """Return the argument parser every script shares: ``--smoke`` for the seconds-long run."""
    result = argparse.ArgumentParser(description=description)
    result.add_argument(
        "--smoke",
        action="store_true",
        help="a run of a second or two with small counts: checks the script works, "
        "its figures mean little",
    )
    return result


def machine_line() -> str:
    """Return one line naming the date, the machine and the interpreter, for the record."""
    cores = psutil.cpu_count(logical=True)
    when = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    return f"# {when}; {cores} cores; Python {platform.python_version()}; {platform.system()}"


@dataclass
class Report:
    """Collects the figures of one run and prints them as they come."""

    title: str
    smoke: bool = False
    verdicts: list[bool] = field(default_factory=list)

    def __post_init__(self) -> None:
        mode = " (smoke run: small counts, figures only show that it works)" if self.smoke else ""
        print(f"== {self.title}{mode}")
        print(machine_line())
        sys.stdout.flush()

    def note(self, text: str) -> None:
        """Print a line of explanation (how the figure was taken)."""
        print(f"  {text}", flush=True)

    def baseline(self, label: str, value: float, unit: str) -> None:
        """Print the baseline figure."""
        print(f"baseline: {label}: {_number(value)} {unit}", flush=True)

    def measured(self, label: str, value: float, unit: str) -> None:
        """Print the measured figure."""
        print(f"measured: {label}: {_number(value)} {unit}", flush=True)

    def ratio(self, value: float, meaning: str) -> None:
        """Print the ratio of measured to baseline (``meaning`` says which way round)."""
        print(f"ratio: {value:.3g} ({meaning})", flush=True)

    def target(self, text: str, met: bool, how_far: str = "", *, timing: bool = False) -> bool:
        """Print one target with MET or MISSED (and by how much); return ``met``.

        A ``timing`` target (one that a loaded machine can miss with nothing wrong) is printed
        but does not decide a smoke run's result: the suite makes no timed assertions."""
        if not (timing and self.smoke):
            self.verdicts.append(bool(met))
        tail = "" if met or not how_far else f" ({how_far})"
        judged = " (timing: not judged in a smoke run)" if timing and self.smoke else ""
        print(f"target: {text}{tail}: {MET if met else MISSED}{judged}", flush=True)
        return bool(met)

    def finish(self) -> int:
        """Print the overall result; return the exit status (0 all met, 1 one missed)."""
        met = bool(self.verdicts) and all(self.verdicts)
        print(f"result: {MET if met else MISSED}", flush=True)
        return EXIT_MET if met else EXIT_MISSED


def _number(value: float) -> str:
    if isinstance(value, int) or float(value).is_integer():
        return f"{value:.0f}"
    magnitude = abs(value)
    if magnitude >= 100:
        return f"{value:.0f}"
    if magnitude >= 1:
        return f"{value:.3g}"
    return f"{value:.3g}"


def parse(output: str) -> dict[str, list[str]]:
    """Return the report's lines by kind (``baseline``, ``measured``, ``ratio``, ``target``,
    ``result``), for the smoke tests."""
    kinds: dict[str, list[str]] = {}
    for line in output.splitlines():
        kind, separator, rest = line.partition(": ")
        if separator and kind in ("baseline", "measured", "ratio", "target", "result"):
            kinds.setdefault(kind, []).append(rest)
    return kinds


def median(values: Sequence[float]) -> float:
    """Return the median of ``values`` (the middle one, or the mean of the middle two)."""
    ordered = sorted(values)
    if not ordered:
        raise ValueError("median of no values")
    middle = len(ordered) // 2
    if len(ordered) % 2:
        return ordered[middle]
    return (ordered[middle - 1] + ordered[middle]) / 2
