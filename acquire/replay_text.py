"""What `chargebook replay` prints: the verdict in one line, then the differences and why."""

from __future__ import annotations

import json
from typing import Any

from chargebook.acquire.replay import ReplayReport

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
        lines.append("")
        for difference in comparison.differences:
            lines.append(
                f"{difference.what}: {change_cell(difference.original, difference.replay)}"
            )
            lines.append(f"  why: {difference.why}")
    if report.traffic_notes:
        lines += ["", "Commands sent differently:", *(f"  {n}" for n in report.traffic_notes)]
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


def change_cell(original: Any, replay: Any) -> str:
    """Return ``original → replay`` for one difference; flags as the codes gone and added."""
    if _flags(original) and _flags(replay):
        old = [f["code"] for f in original]
        new = [f["code"] for f in replay]
        gone = [f"-{code}" for code in old if code not in new]
        added = [f"+{code}" for code in new if code not in old]
        return ", ".join(gone + added) or "same codes, other messages"
    return f"{cell(original)} → {cell(replay)}"


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
