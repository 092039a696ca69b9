"""The readings of the current set as they arrive, a small plot, running statistics and flags."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from chargebook.acquire.protocol import severity_rank
from chargebook.tui import snapshot_view, text
from chargebook.tui.widgets.drawn_when_composed import DrawnWhenComposed
from chargebook.tui.widgets.reading_lines import ReadingLines
from chargebook.tui.widgets.text_block import TextBlock
from textual.app import ComposeResult
from textual.containers import Vertical
from textual.reactive import reactive

#: The readings' columns: heading, least width in characters, aligned right?
READING_COLUMNS: tuple[tuple[str, int, bool], ...] = (
    ("#", 2, True),
    ("Charge nC", 9, True),
    ("How", 6, False),
    ("Flag", 8, False),
)


def reading_label(reading: dict[str, Any]) -> str:
    """Return the reading's name as the daemon gave it ("s1" settling, then "1", "2", ...)."""
    return str(reading.get("label") or reading["seq"])


def reading_cells(reading: dict[str, Any]) -> tuple[str, str, str, str]:
    """Return one reading's cells: number, charge in nC, how captured, flag marker."""
    marker = text.reading_marker(reading.get("flags") or [], bool(reading.get("settling")))
    return (
        reading_label(reading),
        text.number(reading["charge_nC"], 4),
        str(reading.get("capture") or ""),
        marker,
    )


class CellsByReading:
    """Each reading's cells, worked out once: the client keeps a reading the daemon did not
    change as the very object it held, so at the 60th reading of a set only the new one is
    formatted."""

    def __init__(self) -> None:
        self._held: dict[int, tuple[dict[str, Any], tuple[str, str, str, str]]] = {}

    def __call__(self, reading: dict[str, Any]) -> tuple[str, str, str, str]:
        held = self._held.get(id(reading))
        if held is None or held[0] is not reading:  # an id reused by another object
            held = self._held[id(reading)] = (reading, reading_cells(reading))
        return held[1]

    def forget(self) -> None:
        """Forget the readings held (another set is shown)."""
        self._held.clear()


def rows_for(set_info: dict[str, Any] | None) -> int:
    """Return how many lines the set's readings will take when it is complete: the readings it
    needs and the settling readings taken so far (or the readings it holds, if more)."""
    if not set_info:
        return 0
    readings = set_info.get("readings", [])
    settling = sum(1 for reading in readings if reading.get("settling"))
    return max(len(readings), int(set_info.get("readings_needed") or 0) + settling)


def readings_lines(
    set_info: dict[str, Any] | None,
    cells: Callable[[dict[str, Any]], tuple[str, str, str, str]] = reading_cells,
) -> list[str]:
    """Return the set's readings as fixed-width lines under a heading line; ``cells`` gives a
    reading's cells (:func:`reading_cells`, or a :class:`CellsByReading` that remembers them).

    Plain lines, not a table widget: at 50 readings a second the console redraws them many
    times a second, and plain lines cost little to measure and paint.
    """
    rows = [cells(reading) for reading in (set_info or {}).get("readings", [])]
    headings = tuple(heading for heading, _width, _right in READING_COLUMNS)
    widths = [
        max(least, *(len(row[index]) for row in (headings, *rows)))
        for index, (_heading, least, _right) in enumerate(READING_COLUMNS)
    ]

    def line(cells: tuple[str, ...]) -> str:
        padded = (
            cell.rjust(width) if right else cell.ljust(width)
            for cell, width, (_h, _l, right) in zip(cells, widths, READING_COLUMNS, strict=True)
        )
        return " " + "  ".join(padded) + " "

    return [line(cells) for cells in (headings, *rows)]


def reading_flag_lines(set_info: dict[str, Any] | None) -> list[str]:
    """Return the flags of the set and of its readings ("#3 ! outlier ..."), worst first."""
    if not set_info:
        return []
    flagged = [
        (severity_rank(item), f"#{reading_label(reading)} {text.flag(item)}")
        for reading in set_info.get("readings", [])
        for item in reading.get("flags") or []
    ]
    flagged += [(severity_rank(item), text.flag(item)) for item in set_info.get("flags") or []]
    lines = [line for _rank, line in sorted(flagged, key=lambda pair: pair[0])]
    return lines or text.flags_or_ok([], "set: no flags")


def flag_summary_lines(set_info: dict[str, Any] | None) -> list[str]:
    """Return the set's flags in at most two lines: the worst, then how many more (the Flags
    tab lists them all), so the readings keep the rest of the panel."""
    lines = reading_flag_lines(set_info)
    more = len(lines) - 1
    return lines[:1] + ([f"+{more} more flag{'s' if more > 1 else ''}: press 4"] if more else [])


class ReadingSetPanel(DrawnWhenComposed, Vertical):
    """The set being taken (or just taken): table, a bar per reading on a stated scale, mean and
    relative SD, flags.

    The readings' area keeps a line for every reading the set will hold, so a new reading is
    drawn in its own line without laying the screen out again; the area follows the newest
    reading. Under it, the set's worst flag and how many more (every flag in full: tab 4).
    """

    set_info: reactive[dict[str, Any] | None] = reactive(None, always_update=True, repaint=False)
    _shown_set: dict[str, Any] | None = None

    def __init__(self, *, id: str | None = None) -> None:
        super().__init__(id=id)
        self._cells = CellsByReading()

    def compose(self) -> ComposeResult:
        yield TextBlock(id="set-title", classes="panel-title")
        yield TextBlock(id="readings-heading")
        yield ReadingLines(id="readings-table")
        yield ReadingLines(id="set-flags", follow=False)
        yield TextBlock(id="readings-plot")
        yield TextBlock(id="set-stats")

    def watch_set_info(self, set_info: dict[str, Any] | None) -> None:
        self.redraw()

    def _draw_held(self) -> None:
        if self.set_info is self._shown_set and self.set_info is not None:
            return  # the client's very object: the daemon changed nothing in the set
        self._draw(self.set_info)

    def _draw(self, set_info: dict[str, Any] | None) -> None:
        another_set = (set_info or {}).get("id") != (self._shown_set or {}).get("id")
        if another_set:
            self._cells.forget()
        self._shown_set = set_info
        title = "No reading set yet"
        if set_info:
            status = text.set_status(set_info["status"])
            title = f"{snapshot_view.set_title(set_info)}: {status}"
        self.query_one("#set-title", TextBlock).show(title)
        heading, *lines = readings_lines(set_info, self._cells)
        self.query_one("#readings-heading", TextBlock).show(heading)
        self.query_one("#readings-table", ReadingLines).show_lines(
            lines, rows_for(set_info), another=another_set
        )
        charges = snapshot_view.set_charges_nC(set_info)
        mean_nC = ((set_info or {}).get("stats") or {}).get("mean_nC")
        bars = text.deviation_bars(charges, mean_nC)
        self.query_one("#readings-plot", TextBlock).show(
            f"{bars}\n{text.bar_scale_caption()}" if bars else ""
        )
        self.query_one("#set-stats", TextBlock).show(
            f"{snapshot_view.set_count_text(set_info)} · {snapshot_view.set_stats_text(set_info)}"
        )
        self.query_one("#set-flags", ReadingLines).show_lines(flag_summary_lines(set_info))
