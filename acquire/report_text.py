"""Plain-text rendering for the terminal: tables, and a small character plot for history."""

from __future__ import annotations

from collections.abc import Sequence

from chargebook.acquire.report_sections import Table


def table_text(table: Table, *, title: bool = True) -> str:
    """Return ``table`` as aligned text columns, with its title and note."""
    lines = [table.title, "-" * len(table.title)] if title else []
    if table.rows:
        widths = [len(h) for h in table.headers]
        for row in table.rows:
            widths = [max(w, len(cell)) for w, cell in zip(widths, row, strict=True)]
        lines.append(_row(table.headers, widths))
        lines.append(_row(tuple("-" * w for w in widths), widths))
        lines += [_row(row, widths) for row in table.rows]
    if table.note:
        lines.append(table.note)
    return "\n".join(lines)


def _row(cells: Sequence[str], widths: Sequence[int]) -> str:
    padded = [cell.ljust(width) for cell, width in zip(cells, widths, strict=True)]
    return "  ".join(padded).rstrip()


def tables_text(tables: Sequence[Table]) -> str:
    """Return several tables as text, separated by blank lines."""
    return "\n\n".join(table_text(t) for t in tables)


def deviation_plot(
    deviations_pct: Sequence[float | None],
    tolerance_pct: float,
    labels: Sequence[str],
    height: int = 21,
) -> str:
    """Return a character plot of deviations (%) with the ±tolerance band, one column each.

    ``o`` is a point within tolerance, ``X`` one outside, ``?`` a session without a result.
    Rows run from the largest deviation (top) to the most negative; ``=`` marks the tolerance
    lines and ``.`` zero.
    """
    known = [abs(d) for d in deviations_pct if d is not None]
    span = max([tolerance_pct * 1.5, *known]) if known else tolerance_pct * 1.5
    step = 2 * span / (height - 1)
    levels = [span - i * step for i in range(height)]
    column = max([3, *(len(label) + 1 for label in labels)])
    rows = []
    for level in levels:
        marker = _axis_marker(level, tolerance_pct, step)
        cells = []
        for deviation in deviations_pct:
            if deviation is None:
                hit = abs(level) < step / 2
                cells.append("?" if hit else marker)
            elif abs(deviation - level) < step / 2 or _clipped(deviation, level, levels):
                cells.append("X" if abs(deviation) > tolerance_pct else "o")
            else:
                cells.append(marker)
        rows.append((f"{level:+7.2f} % |" + "".join(c.center(column) for c in cells)).rstrip())
    axis = " " * 10 + "+" + "-" * (column * len(deviations_pct))
    names = (" " * 11 + "".join(label.center(column) for label in labels)).rstrip()
    legend = (
        f"o within ±{tolerance_pct:g} %   X outside   ? no result   "
        f"= tolerance line   . zero   columns: session ids"
    )
    return "\n".join([*rows, axis, names, legend])


def _axis_marker(level: float, tolerance_pct: float, step: float) -> str:
    if abs(abs(level) - tolerance_pct) < step / 2:
        return "="
    if abs(level) < step / 2:
        return "."
    return " "


def _clipped(deviation: float, level: float, levels: Sequence[float]) -> bool:
    """True when the deviation lies beyond the plot and ``level`` is the nearest edge row."""
    return (deviation > levels[0] and level == levels[0]) or (
        deviation < levels[-1] and level == levels[-1]
    )
