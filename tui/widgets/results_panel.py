"""Every correction factor with its state, then corrected charge, dose, deviation, uncertainty."""

from __future__ import annotations

from typing import Any

from chargebook.tui import snapshot_view, text
from chargebook.tui.widgets.drawn_when_composed import DrawnWhenComposed
from chargebook.tui.widgets.text_block import TextBlock
from rich.table import Table
from textual.app import ComposeResult
from textual.containers import VerticalScroll
from textual.reactive import reactive


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
    """Return the results table: raw and corrected charge, dose, per MU, deviation, u_c."""
    table = Table(box=None, padding=(0, 1), show_header=False, show_edge=False, expand=True)
    table.add_column("What")
    table.add_column("Value")
    for label, value in snapshot_view.result_rows(snapshot):
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


class ResultsPanel(DrawnWhenComposed, VerticalScroll):
    """Factor table, results and the session's flags, as the daemon computed them.

    It scrolls, and takes the focus (Tab), so that every line can be reached from the keyboard
    (↑ ↓, Page Up, Page Down, Home, End) on an 80 × 24 terminal.
    """

    snapshot: reactive[dict[str, Any] | None] = reactive(None, always_update=True, repaint=False)
    _drawn_from: tuple[object, ...] = ()

    def compose(self) -> ComposeResult:
        yield TextBlock("Results", id="results-title", classes="panel-title")
        yield TextBlock(id="results-problem")
        yield TextBlock(id="factor-table")
        yield TextBlock(id="results-table")
        yield TextBlock(id="session-flags", keep_height=True)

    def watch_snapshot(self, snapshot: dict[str, Any] | None) -> None:
        self.redraw()

    def _draw_held(self) -> None:
        if self.snapshot is None:
            return
        parts = tuple(self.snapshot.get(key) for key in RESULTS_PARTS)
        if len(parts) == len(self._drawn_from) and all(
            part is drawn for part, drawn in zip(parts, self._drawn_from, strict=True)
        ):
            return  # the client's very objects: the daemon sent no new results (most readings)
        self._drawn_from = parts
        self._draw(self.snapshot)

    def _draw(self, snapshot: dict[str, Any]) -> None:
        self.query_one("#results-title", TextBlock).show(results_title(snapshot))
        problem = snapshot.get("results_error")
        note = self.query_one("#results-problem", TextBlock)
        note.show(f"!! Results not computed: {problem}" if problem else "")
        note.display = bool(problem)
        results = snapshot.get("results")
        factors = snapshot_view.factor_rows(results)
        self.query_one("#factor-table", TextBlock).show_built(
            factors, lambda: factor_table(results)
        )
        rows = snapshot_view.result_rows(snapshot)
        self.query_one("#results-table", TextBlock).show_built(
            rows, lambda: results_table(snapshot)
        )
        flags = text.flags_or_ok(snapshot_view.session_flags(snapshot), "session: no flags")
        shown = "\n".join(["Session flags (every flag: tab 4):", *flags])
        self.query_one("#session-flags", TextBlock).show(shown)
