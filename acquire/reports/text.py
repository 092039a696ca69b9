"""Plain-text rendering for the terminal: tables, and a small character plot for history."""

from __future__ import annotations

import math
import re
import textwrap
from collections.abc import Sequence
from dataclasses import replace

from chargebook.acquire.reports.table import Table

#: Control characters (C0 but tab and newline, DEL, C1) mapped to visible ``\\xNN`` escapes.
_CONTROL_ESCAPES = {
    code: f"\\x{code:02x}"
    for code in (*range(0x20), 0x7F, *range(0x80, 0xA0))
    if code not in (0x09, 0x0A)
}


#: Any character :func:`printable` escapes.
_CONTROL = re.compile("[" + "".join(re.escape(chr(code)) for code in _CONTROL_ESCAPES) + "]")


def printable(text: str) -> str:
    """Return ``text`` with control characters shown as ``\\xNN``, newlines kept.

    Stored text (an operator's comment, a metadata field, an instrument's identity) may hold
    terminal escape sequences; printed raw they could rewrite what a reader sees.
    """
    if text.isascii() and text.isprintable():
        return text  # the common case, tested in C: nothing to escape
    return text.translate(_CONTROL_ESCAPES)


def table_text(table: Table, *, title: bool = True, width: int | None = None) -> str:
    """Return ``table`` as aligned text columns, with its title and note; control characters
    in any cell are escaped (:func:`printable`).

    With ``width`` (characters, e.g. the terminal's), a table wider than that has its widest
    columns wrapped onto continuation lines, and the note is wrapped, so no line runs past it.
    """
    rows = table.rows
    if _CONTROL.search("\t".join("\t".join(row) for row in rows)):  # else nothing to escape
        rows = tuple(tuple(printable(cell) for cell in row) for row in rows)
    table = replace(
        table,
        title=printable(table.title),
        headers=tuple(printable(h) for h in table.headers),
        rows=rows,
        note=printable(table.note),
    )
    lines = [table.title, "-" * len(table.title)] if title else []
    if table.rows:
        columns = zip(*table.rows, strict=True)
        widths = [
            max(len(h), *map(len, column)) for h, column in zip(table.headers, columns, strict=True)
        ]
        if width is not None:
            longest_words = [
                max((len(word) for row in table.rows for word in row[i].split()), default=0)
                for i in range(len(widths))
            ]
            widths = _fit_widths(widths, [len(h) for h in table.headers], longest_words, width)
        if width is not None and _line_width(widths) > width:
            lines += _record_lines(table, width)  # too many columns: one block per row
        else:
            lines += _wrapped_row(table.headers, widths)
            lines.append(_row(tuple("-" * w for w in widths), widths))
            if width is None:  # each column as wide as its widest cell: no cell wraps
                padded = "  ".join(f"{{:<{w}}}" for w in widths)  # _row's, for many rows
                lines += [padded.format(*row).rstrip() for row in table.rows]
            else:
                for row in table.rows:
                    lines += _wrapped_row(row, widths)
    if table.note:
        lines += textwrap.wrap(table.note, width) if width is not None else [table.note]
    return "\n".join(lines)


#: A column is never wrapped narrower than this, so words stay readable.
_NARROWEST_WRAPPED = 12
_GAP = 2  # spaces between columns


def _line_width(widths: Sequence[int]) -> int:
    return sum(widths) + _GAP * (len(widths) - 1)


def _record_lines(table: Table, width: int) -> list[str]:
    """Return each row as a block of ``header  value`` lines, values wrapped to ``width``."""
    label_width = max(len(h) for h in table.headers)
    value_width = max(width - label_width - _GAP, _NARROWEST_WRAPPED)
    lines: list[str] = []
    for number, row in enumerate(table.rows):
        if number:
            lines.append("")
        for header, cell in zip(table.headers, row, strict=True):
            values = textwrap.wrap(cell, value_width, break_long_words=False) or [""]
            labels = [header] + [""] * (len(values) - 1)
            lines += [
                _row((label, value), (label_width, value_width))
                for label, value in zip(labels, values, strict=True)
            ]
    return lines


def _fit_widths(
    widths: list[int], header_widths: list[int], longest_words: list[int], width: int
) -> list[int]:
    """Return column widths that fit ``width``, narrowing the widest columns first, never below
    the longest word of a column (a time or a number is never cut in two)."""
    widths = list(widths)
    while _line_width(widths) > width:
        widest = max(range(len(widths)), key=lambda i: widths[i])
        floor = max(_NARROWEST_WRAPPED, min(header_widths[widest], 20), longest_words[widest])
        if widths[widest] <= floor:
            break  # as narrow as it may go: the line stays long rather than unreadable
        widths[widest] -= 1
    return widths


def _wrapped_row(cells: Sequence[str], widths: Sequence[int]) -> list[str]:
    """Return one row as one or more lines, each cell wrapped to its column's width."""
    if all(len(cell) <= w for cell, w in zip(cells, widths, strict=True)):
        return [_row(cells, widths)]  # the common case: every cell fits on one line
    columns = [
        textwrap.wrap(cell, w, break_long_words=False) or [""] if len(cell) > w else [cell]
        for cell, w in zip(cells, widths, strict=True)
    ]
    height = max(len(c) for c in columns)
    return [_row(tuple(c[i] if i < len(c) else "" for c in columns), widths) for i in range(height)]


def _row(cells: Sequence[str], widths: Sequence[int]) -> str:
    padded = [cell.ljust(width) for cell, width in zip(cells, widths, strict=True)]
    return "  ".join(padded).rstrip()


def tables_text(tables: Sequence[Table], *, width: int | None = None) -> str:
    """Return several tables as text, separated by blank lines (wrapped to ``width``)."""
    return "\n\n".join(table_text(t, width=width) for t in tables)


def deviation_plot(
    deviations_pct: Sequence[float | None],
    tolerance_pct: float,
    labels: Sequence[str],
    height: int = 21,
    *,
    uncertainties_pct: Sequence[float | None] | None = None,
    action_pct: float | None = None,
    dates: Sequence[str] | None = None,
) -> str:
    """Return a character plot of deviations (%) with the ±tolerance band, one column each.

    ``o`` is a point within tolerance, ``X`` one outside, ``?`` a session without a result.
    Rows run from the largest deviation (top) to the most negative, ``height`` rows at most, a
    whole number of them per tolerance; ``=`` marks the tolerance lines, ``#`` the action
    lines (``action_pct``) and ``.`` zero. A point beyond the plot is drawn on its edge row as
    ``^`` (above) or ``v`` (below). ``uncertainties_pct``: each point's expanded uncertainty,
    drawn as ``|`` above and below it. ``dates``: a second label row (the columns are in date
    order).
    """
    known = [abs(d) for d in deviations_pct if d is not None]
    span = max([tolerance_pct * 1.5, (action_pct or 0.0) * 1.2, *known])
    half = (height - 1) // 2
    step = _row_step(tolerance_pct, action_pct, max(1, math.floor(half * tolerance_pct / span)))
    levels = [i * step for i in range(half, -half - 1, -1)]
    column = max([3, *(len(label) + 1 for label in [*labels, *(dates or ())])])
    row_of = [_nearest_row(d, levels[0], step, len(levels)) for d in deviations_pct]
    bars = _bar_rows(deviations_pct, uncertainties_pct, levels[0], step, len(levels))
    rows = []
    for index, level in enumerate(levels):
        marker = _axis_marker(level, tolerance_pct, step, action_pct)
        cells = []
        for deviation, row, bar in zip(deviations_pct, row_of, bars, strict=True):
            if row != index:
                in_bar = bar[0] <= index <= bar[1] and marker in (" ", ".")
                cells.append("|" if in_bar else marker)
            elif deviation is None:
                cells.append("?")
            elif deviation > levels[0] + step / 2 or deviation < levels[-1] - step / 2:
                cells.append("^" if deviation > 0 else "v")
            else:
                cells.append("X" if abs(deviation) > tolerance_pct else "o")
        rows.append((f"{level:+7.2f} % |" + "".join(c.center(column) for c in cells)).rstrip())
    axis = " " * 10 + "+" + "-" * (column * len(deviations_pct))
    names = (" " * 11 + "".join(label.center(column) for label in labels)).rstrip()
    legend = (
        f"o within ±{tolerance_pct:g} %   X outside   ^ v beyond the plot   ? no result   "
        f"= tolerance   . zero   columns: session ids"
    )
    extra = []
    if dates is not None:
        extra.append((" " * 11 + "".join(d.center(column) for d in dates)).rstrip())
        legend += ", then their dates"
    if uncertainties_pct is not None:
        legend += "   | expanded uncertainty"
    if action_pct is not None:
        legend += f"   # action level ±{action_pct:g} %"
    return "\n".join([*rows, axis, names, *extra, legend])


def _row_step(tolerance_pct: float, action_pct: float | None, most: int) -> float:
    """Return the plot's row step: a whole number of rows per tolerance (at most ``most``), so
    that the tolerance lines fall on rows, and per action level too when one allows it."""
    for rows in range(most, 0, -1):
        step = tolerance_pct / rows
        if action_pct is None or abs(action_pct / step - round(action_pct / step)) < 1e-9:
            return step
    return tolerance_pct / most


def _bar_rows(
    deviations_pct: Sequence[float | None],
    uncertainties_pct: Sequence[float | None] | None,
    top: float,
    step: float,
    count: int,
) -> list[tuple[int, int]]:
    """Return, per point, the first and last row its uncertainty bar covers ((1, 0): none)."""
    if uncertainties_pct is None:
        return [(1, 0)] * len(deviations_pct)
    found = []
    for deviation, u in zip(deviations_pct, uncertainties_pct, strict=True):
        if deviation is None or u is None:
            found.append((1, 0))
            continue
        found.append(
            (
                _nearest_row(deviation + u, top, step, count),
                _nearest_row(deviation - u, top, step, count),
            )
        )
    return found


def _axis_marker(
    level: float, tolerance_pct: float, step: float, action_pct: float | None = None
) -> str:
    if abs(abs(level) - tolerance_pct) < step / 2:
        return "="
    if action_pct is not None and abs(abs(level) - action_pct) < step / 2:
        return "#"
    if abs(level) < step / 2:
        return "."
    return " "


def _nearest_row(deviation: float | None, top: float, step: float, count: int) -> int:
    """Return the row nearest ``deviation`` (zero's row for None), kept within the plot."""
    value = 0.0 if deviation is None else deviation
    return min(count - 1, max(0, round((top - value) / step)))
