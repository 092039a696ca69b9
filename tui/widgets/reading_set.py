"""The readings of the current set as they arrive, each with its bar, running statistics and
flags: one widget that draws its own lines (:mod:`chargebook.tui.widgets.own_lines`)."""

from __future__ import annotations

import operator
from collections.abc import Sequence
from typing import Any, ClassVar

from chargebook.acquire.protocol import severity_rank
from chargebook.tui import snapshot_view, text
from chargebook.tui.widgets.own_lines import OwnLines, at_most, text_line, wrapped
from textual import events
from textual.binding import Binding, BindingType
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


#: The readings' heading line's cells.
HEADINGS = tuple(heading for heading, _width, _right in READING_COLUMNS)


#: Each column's width without a reading: its least, or its heading's.
LEAST_WIDTHS = tuple(max(least, len(heading)) for heading, least, _right in READING_COLUMNS)


def column_widths(
    rows: Sequence[tuple[str, ...]], at_least: Sequence[int] = LEAST_WIDTHS
) -> list[int]:
    """Return each column's width in characters: its widest cell, heading included, and at
    least ``at_least`` (the widths of rows measured before)."""
    if not rows:
        return list(at_least)
    columns = zip(*rows, strict=True)  # each column's cells
    return [max(least, *map(len, column)) for column, least in zip(columns, at_least, strict=True)]


class CellsByReading:
    """Each reading's cells, worked out once: the client keeps a reading the daemon did not
    change as the very object it held, so at the 60th reading of a set only the new one is
    formatted."""

    def __init__(self) -> None:
        self._held: dict[int, tuple[dict[str, Any], tuple[str, str, str, str]]] = {}
        self._measured: tuple[list[dict[str, Any]], list[int]] = ([], list(LEAST_WIDTHS))

    def __call__(self, reading: dict[str, Any]) -> tuple[str, str, str, str]:
        held = self._held.get(id(reading))
        if held is None or held[0] is not reading:  # an id reused by another object
            held = self._held[id(reading)] = (reading, reading_cells(reading))
        return held[1]

    def widths(self, readings: list[dict[str, Any]]) -> list[int]:
        """Return the columns' widths for ``readings`` (:func:`column_widths` of their cells):
        when the readings measured last are the very first objects of ``readings`` (a reading
        added), only the new ones are measured."""
        measured, widths = self._measured
        if len(measured) <= len(readings) and all(map(operator.is_, measured, readings)):
            widths = column_widths([self(reading) for reading in readings[len(measured) :]], widths)
        else:
            widths = column_widths([self(reading) for reading in readings])
        self._measured = (list(readings), widths)
        return widths

    def forget(self) -> None:
        """Forget the readings held (another set is shown)."""
        self._held.clear()
        self._measured = ([], list(LEAST_WIDTHS))


def aligned(cells: tuple[str, ...], widths: Sequence[int]) -> str:
    """Return one line of the readings: ``cells`` padded to ``widths``, aligned by column."""
    padded = (
        cell.rjust(width) if right else cell.ljust(width)
        for cell, width, (_h, _l, right) in zip(cells, widths, READING_COLUMNS, strict=True)
    )
    return " " + "  ".join(padded) + " "


def readings_lines(
    set_info: dict[str, Any] | None,
    cells: CellsByReading | None = None,
    shown: slice = slice(None),
) -> list[str]:
    """Return the set's readings ``shown`` (all by default) as fixed-width lines under a
    heading line; ``cells`` gives the readings' cells and widths, remembered from one call to
    the next (a new one by default). The columns are as wide as every reading needs, shown or
    not, so scrolling never moves them.

    Plain lines, not a table widget: at 50 readings a second the console redraws them many
    times a second, and plain lines cost little to measure and paint.
    """
    cells = cells or CellsByReading()
    readings = (set_info or {}).get("readings", [])
    widths = cells.widths(readings)
    return [aligned(row, widths) for row in (HEADINGS, *map(cells, readings[shown]))]


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
    return lines[:1] + (
        [f"+{more} more flag{'s' if more > 1 else ''}: press 4"] if more > 0 else []
    )


#: Lines the readings' area keeps at least, however little room the panel has.
LEAST_READING_ROWS = 3
#: Lines the set's flags take at most under the readings (every flag in full: tab 4).
FLAG_ROWS = 2
#: The keys that scroll the readings' area (with the focus), by how many lines, and what for.
SCROLL_KEYS: tuple[tuple[str, int, str], ...] = (
    ("up", -1, "Earlier"),
    ("down", 1, "Later"),
    ("pageup", -10, "Page up"),
    ("pagedown", 10, "Page down"),
    ("home", -100_000, "First"),
    ("end", 100_000, "Newest"),
)


def reading_rows(
    set_info: dict[str, Any] | None,
    cells: CellsByReading | None = None,
    shown: slice = slice(None),
) -> tuple[str, list[str]]:
    """Return (heading, one line per reading ``shown``, all by default): the readings' lines
    with, last, each reading's bar for its deviation from the set's mean on the stated scale
    (see :func:`chargebook.tui.text.deviation_bars`). Only the lines asked for are built: the
    panel shows a window of a set of a hundred readings, at every reading."""
    heading, *lines = readings_lines(set_info, cells, shown)
    charges = snapshot_view.set_charges_nC(set_info)[shown]
    mean_nC = ((set_info or {}).get("stats") or {}).get("mean_nC")
    bars = text.deviation_bars(charges, mean_nC).split(" ") if charges else []
    if len(bars) != len(lines):
        return heading, lines
    return heading, [f"{line}{bar}" for line, bar in zip(lines, bars, strict=True)]


class ReadingSetPanel(OwnLines, can_focus=True):
    """The set being taken (or just taken): its title, a line per reading with a bar for its
    deviation from the mean on a stated scale, the worst flag and how many more, the count,
    mean and relative SD.

    One widget drawing its own lines: a new reading changes the lines of the readings' area
    (which follows the newest reading) and the statistics, and only those are drawn again,
    with no new layout of the screen. With the focus, ↑ ↓, Page Up, Page Down, Home and End
    (or the mouse wheel) scroll back through the readings; End follows the newest again.
    """

    DEFAULT_CSS = """
    ReadingSetPanel {
        height: 1fr;
    }
    ReadingSetPanel > .reading-set--title {
        text-style: bold;
    }
    """
    COMPONENT_CLASSES: ClassVar[set[str]] = {"reading-set--title"}
    BINDINGS: ClassVar[list[BindingType]] = [
        Binding(key, f"scroll_readings({lines})", words, show=False)
        for key, lines, words in SCROLL_KEYS
    ]

    set_info: reactive[dict[str, Any] | None] = reactive(None, always_update=True, repaint=False)
    _shown_set: dict[str, Any] | None = None

    def __init__(self, *, id: str | None = None) -> None:
        super().__init__(id=id)
        self._cells = CellsByReading()
        self._count = 0  # how many readings the set shown holds (one line each)
        self._window = 0  # how many reading lines are in sight
        self._first: int | None = None  # first reading line in sight; None: follow the newest

    @property
    def rows(self) -> int:
        """Return how many lines the set's readings hold (one per reading)."""
        return self._count

    def watch_set_info(self, set_info: dict[str, Any] | None) -> None:
        if self.set_info is self._shown_set and self.set_info is not None:
            return  # the client's very object: the daemon changed nothing in the set
        self._draw(self.set_info)

    def on_mount(self) -> None:
        self._draw(self.set_info)  # a set given before the panel was mounted

    def _draw(self, set_info: dict[str, Any] | None) -> None:
        if (set_info or {}).get("id") != (self._shown_set or {}).get("id"):
            self._cells.forget()
            self._first = None
        self._shown_set = set_info
        self.rebuild()

    def rebuild(self) -> None:
        """Build the panel's lines from the set shown, at the panel's size."""
        width, height = self.content_region.size
        if width <= 0:
            return
        set_info = self._shown_set
        title = "No reading set yet"
        if set_info:
            title = f"{snapshot_view.set_title(set_info)}: {text.set_status(set_info['status'])}"
        bold = self.part_style("reading-set--title")
        above = [text_line(line, bold) for line in wrapped([title], width)]
        below = [text_line(line) for line in flag_summary_lines(set_info)[:FLAG_ROWS]]
        below.append(text_line(" " + text.bar_scale_caption()))
        count = snapshot_view.set_count_text(set_info)
        stats = snapshot_view.set_stats_text(set_info)
        below += [text_line(line) for line in at_most(wrapped([f"{count} · {stats}"], width), 2)]
        self._count = len((set_info or {}).get("readings") or [])
        self._window = max(LEAST_READING_ROWS, height - len(above) - 1 - len(below))
        first = self._first_in_sight()
        shown = slice(first, first + self._window)
        heading, rows = reading_rows(set_info, self._cells, shown)
        in_sight = [text_line(row) for row in rows]
        in_sight += [()] * (self._window - len(in_sight))  # blank lines fill a window not full
        self.show_lines([*above, text_line(heading, bold), *in_sight, *below])

    def _first_in_sight(self) -> int:
        """Return the first reading line in sight (the newest followed, or scrolled back)."""
        last_first = max(self._count - self._window, 0)
        if self._first is not None and self._first >= last_first:
            self._first = None  # scrolled down to the newest: follow it again
        return self._newest_first() if self._first is None else self._first

    def _newest_first(self) -> int:
        """Return the first reading line in sight while following the newest: when the newest
        reaches the foot of the area, the area moves on by half its height (blank lines
        below), so most readings draw their own line and the count, not the whole area."""
        over = self._count - self._window
        if over <= 0:
            return 0
        step = max(self._window // 2, 1)
        return -(-over // step) * step

    def action_scroll_readings(self, lines: int) -> None:
        """Scroll the readings' area by ``lines`` (negative: back to earlier readings)."""
        last_first = max(self._count - self._window, 0)
        first = last_first if self._first is None else self._first
        self._first = min(max(first + lines, 0), last_first)
        self.rebuild()

    def on_mouse_scroll_up(self, event: events.MouseScrollUp) -> None:
        event.stop()
        self.action_scroll_readings(-3)

    def on_mouse_scroll_down(self, event: events.MouseScrollDown) -> None:
        event.stop()
        self.action_scroll_readings(3)
