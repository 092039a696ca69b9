"""What `chargebook replay` prints: the verdict in one line, then the differences and why."""

from __future__ import annotations

import json
import shutil
from typing import Any

from chargebook.acquire.replay.compare import Difference
from chargebook.acquire.replay.session_replay import ReplayReport
from chargebook.acquire.reports.sections import Table
from chargebook.acquire.reports.text import table_text

#: Longest value shown in a difference; the JSON output has every value whole.
CELL_CHARS = 60


def replay_text(report: ReplayReport) -> str:
    """Return the report as text for the terminal."""
    comparison = report.comparison
    stored = f"as session {report.replay_id}" if report.replay_id is not None else "(not stored)"
    kind = "What-if replay" if report.what_if else "Replay"
    lines = [
        f"{kind} of session {report.original_id} {stored}: profile {report.profile}, "
        f"speed {report.speed:g}, {report.traffic_lines} traffic lines"
    ]
    lines += [f"changed: {change.words()}" for change in comparison.changes]
    if report.stopped:
        lines.append(f"stopped early: {report.stopped}")
    if report.not_stored:
        lines.append(f"not stored: {report.not_stored}")
    lines.append(verdict(report))
    if comparison.differences:
        columns = shutil.get_terminal_size((0, 0)).columns or None  # piped: lines stay whole
        lines += [
            "",
            differences_text(
                comparison.differences, exact_digits=not report.what_if, width=columns
            ),
        ]
    if report.traffic_notes:
        lines += ["", "Where the traffic differs:", *(f"  {n}" for n in report.traffic_notes)]
    return "\n".join(lines)


def verdict(report: ReplayReport) -> str:
    """Return the one-line verdict: exact reproduction, or how many values differ."""
    comparison = report.comparison
    counted = f"{comparison.readings_compared} readings, {comparison.results_compared} results"
    if comparison.exact:
        word = "exact reproduction" if not report.what_if else "no difference"
        return f"{word}: {counted} identical"
    count = len(comparison.differences)
    word = "NOT reproduced" if not report.what_if else "what differs"
    return f"{word}: {count} difference{'s' if count != 1 else ''} over {counted}"


def differences_text(
    differences: list[Difference], *, exact_digits: bool, width: int | None = None
) -> str:
    """Return the differences as a table per reason, the reason said once under its table.

    A what-if shows values at display precision (6 significant digits) with the relative change
    in %; an unchanged replay that does not reproduce shows every digit, since a difference in
    the last bit is what it reports. Flags are said in words: added, gone.
    """
    by_reason: dict[str, list[Difference]] = {}
    for difference in differences:
        by_reason.setdefault(difference.why, []).append(difference)
    blocks = []
    for why, group in by_reason.items():
        rows = tuple(
            (d.what, *_values(d.original, d.replay, exact_digits), _relative_change(d))
            for d in group
        )
        table = Table("", ("what", "original", "replay", "change"), rows)
        blocks.append(f"{table_text(table, title=False, width=width)}\n  why: {why}")
    return "\n\n".join(blocks)


def _values(original: Any, replay: Any, exact_digits: bool) -> tuple[str, str]:
    if _flags(original) and _flags(replay):
        return _flag_words(original, replay)
    shown = cell if exact_digits else display
    return shown(original), shown(replay)


def _flag_words(original: list[dict[str, Any]], replay: list[dict[str, Any]]) -> tuple[str, str]:
    """Return (the flags only the original raised, the flags only the replay raised), in their
    words (their code when wordless)."""
    old = {f["code"]: f for f in original}
    new = {f["code"]: f for f in replay}
    gone = "; ".join(f"{old[c].get('message') or c}" for c in old if c not in new)
    added = "; ".join(f"{new[c].get('message') or c}" for c in new if c not in old)
    if not gone and not added:
        return "the same flags", "in other words"
    return gone or "—", added or "—"


def _relative_change(difference: Difference) -> str:
    original, replay = difference.original, difference.replay
    numbers = all(
        isinstance(v, int | float) and not isinstance(v, bool) for v in (original, replay)
    )
    if not numbers or original == 0:
        return ""
    return f"{100.0 * (replay / original - 1.0):+.3g} %"


def display(value: Any) -> str:
    """Return one value at display precision: numbers to 6 significant digits."""
    if isinstance(value, float):
        return f"{value:.6g}"
    return cell(value)


def _flags(value: Any) -> bool:
    return isinstance(value, list) and all(isinstance(v, dict) and "code" in v for v in value)


def cell(value: Any) -> str:
    """Return one value in a difference: numbers in full, long text cut."""
    if value is None:
        return "none"
    if isinstance(value, float):
        return repr(value)
    text = value if isinstance(value, str) else json.dumps(value, ensure_ascii=False)
    return text if len(text) <= CELL_CHARS else text[: CELL_CHARS - 3] + "..."
