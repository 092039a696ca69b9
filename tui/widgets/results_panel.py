"""Corrected charge, dose, deviation and uncertainty, then every correction factor with its
state, then the checks sent beside them: one scrolling widget that draws its own lines (see
:mod:`chargebook.tui.widgets.own_lines`)."""

from __future__ import annotations

from typing import Any, ClassVar

from chargebook.tui import snapshot_view, text
from chargebook.tui.widgets.held_render import HeldRender
from chargebook.tui.widgets.own_lines import HeldLines, Line, text_line, wrapped
from rich.console import Console
from rich.table import Table
from textual.geometry import Region, Size
from textual.reactive import reactive
from textual.scroll_view import ScrollView
from textual.strip import Strip


def factor_table(results: dict[str, Any] | None) -> Table:
    """Return the factor table: symbol of the chosen convention, value, state in words."""
    table = Table(box=None, padding=(0, 1), show_edge=False, expand=True)
    table.add_column("Factor")
    table.add_column("Value", justify="right")
    table.add_column("State")
    for symbol, value, state in snapshot_view.factor_rows(results):
        table.add_row(*text.plain_row((symbol, value, state)))
    return table


def results_table(snapshot: dict[str, Any]) -> Table:
    """Return the results table: raw and corrected charge, dose, per MU, deviation, u_c, and
    the checks sent beside them (leakage, Boag's k_s, the air)."""
    return labelled_table(snapshot_view.result_rows(snapshot))


def labelled_table(rows: list[tuple[str, str]]) -> Table:
    """Return a two-column table of (label, value) rows, without a header."""
    table = Table(box=None, padding=(0, 1), show_header=False, show_edge=False, expand=True)
    table.add_column("What")
    table.add_column("Value")
    for label, value in rows:
        table.add_row(*text.plain_row((label, value)))
    return table


def results_title(snapshot: dict[str, Any]) -> str:
    """Return the panel title, saying when the results include a set not yet accepted."""
    results = snapshot.get("results") or {}
    convention = text.convention(str(results.get("convention", "")))
    title = f"Results, {convention}" if convention else "Results"
    if snapshot.get("results_provisional"):
        title += " (provisional)"
    return title


#: The parts of a snapshot the results panel is drawn from.
RESULTS_PARTS = ("results", "results_error", "results_provisional", "environment_entries")


def table_lines(console: Console, table: Table, width: int) -> list[Line]:
    """Return ``table`` drawn by Rich at ``width`` cells, one line of segments per screen line."""
    options = console.options.update_width(width)
    return [tuple(line) for line in console.render_lines(table, options, pad=False)]


class ResultsPanel(HeldRender, ScrollView, can_focus=True):
    """Factor table, results and the session's flags, as the daemon computed them.

    It scrolls, and takes the focus (Tab), so that every line can be reached from the keyboard
    (↑ ↓, Page Up, Page Down, Home, End) on an 80 × 24 terminal. One widget drawing its own
    lines: new results redraw the lines that changed; a reading that brings none draws nothing.
    """

    COMPONENT_CLASSES: ClassVar[set[str]] = {"results-panel--title"}
    DEFAULT_CSS = """
    ResultsPanel > .results-panel--title { text-style: bold; }
    """

    snapshot: reactive[dict[str, Any] | None] = reactive(None, always_update=True, repaint=False)
    _drawn_from: tuple[object, ...] = ()

    def __init__(self, *, id: str | None = None) -> None:
        super().__init__(id=id)
        self._held = HeldLines()
        self._tables: dict[str, tuple[object, list[Line]]] = {}  # drawn tables, by source
        self._width = 0

    @property
    def plain_lines(self) -> list[str]:
        """Return the panel's lines as plain text (what an operator reads, scrolled or not)."""
        return ["".join(segment.text for segment in line) for line in self._held.lines]

    def watch_snapshot(self, snapshot: dict[str, Any] | None) -> None:
        if snapshot is None:
            return
        parts = tuple(snapshot.get(key) for key in RESULTS_PARTS)
        if len(parts) == len(self._drawn_from) and all(
            part is drawn for part, drawn in zip(parts, self._drawn_from, strict=True)
        ):
            return  # the client's very objects: the daemon sent no new results (most readings)
        self._drawn_from = parts
        self._draw(snapshot)

    def on_mount(self) -> None:
        if self.snapshot is not None:  # given before the panel was mounted
            self._draw(self.snapshot)

    def on_resize(self) -> None:
        if self.scrollable_content_region.width != self._width and self.snapshot is not None:
            self._draw(self.snapshot)

    def _table(self, name: str, source: object, build: Any, width: int) -> list[Line]:
        """Return the table ``name`` drawn at ``width``, drawn again only when its source
        (the rows it shows) or the width changed."""
        held = self._tables.get(name)
        if held is None or held[0] != (source, width):
            held = self._tables[name] = (
                (source, width),
                table_lines(self.app.console, build(), width),
            )
        return held[1]

    def _draw(self, snapshot: dict[str, Any]) -> None:
        width = self._width = self.scrollable_content_region.width
        if width <= 0:
            return
        title = self.get_component_rich_style("results-panel--title", partial=True)
        lines = [text_line(line, title) for line in wrapped([results_title(snapshot)], width)]
        problem = snapshot.get("results_error")
        if problem:
            lines += [
                text_line(line) for line in wrapped([f"!! Results not computed: {problem}"], width)
            ]
        # The answer first (dose, deviation, uncertainty), then the factors it came from: at
        # 80 x 24 a deviation outside tolerance takes three lines, and the uncertainty below it
        # was scrolled out of sight.
        answer = snapshot_view.answer_rows(snapshot)
        lines += self._table("answer", answer, lambda: labelled_table(answer), width)
        results = snapshot.get("results")
        factors = snapshot_view.factor_rows(results)
        lines += self._table("factors", factors, lambda: factor_table(results), width)
        checks = snapshot_view.check_rows(snapshot)
        lines += self._table("checks", checks, lambda: labelled_table(checks), width)
        flags = text.flags_or_ok(snapshot_view.session_flags(snapshot), "session: no flags")
        flag_words = ["Session flags (every flag: tab 4):", *flags]
        lines += [text_line(line) for line in wrapped(flag_words, width)]
        self._show(lines)

    def _show(self, lines: list[Line]) -> None:
        """Show ``lines``, drawing again only those that changed."""
        count = len(self._held.lines)
        runs = self._held.replace(lines)
        if len(lines) != count:
            # A new height to scroll: the screen is laid out again only when the scrollbar
            # comes or goes (Textual lays it out for every new virtual size).
            self.set_reactive(ResultsPanel.virtual_size, Size(0, len(lines)))
            self._scroll_update(self.virtual_size)
        if runs:  # the lines that changed, in one refresh (as ScrollView.refresh_lines): a
            # flag's new wording at the foot, out of sight, redraws nothing in sight
            top, width = self.scroll_offset.y, max(self.virtual_size.width, self.size.width)
            self.refresh(*(Region(0, first - top, width, past - first) for first, past in runs))

    def render_line(self, y: int) -> Strip:
        width = self.scrollable_content_region.width
        return self._held.strip(y + self.scroll_offset.y, width, self.visual_style.rich_style)
