"""The readings of the current set as they arrive, a small plot, running statistics and flags."""

from __future__ import annotations

from typing import Any

from chargebook.tui import snapshot_view, text
from rich.table import Table
from textual.app import ComposeResult
from textual.containers import Vertical, VerticalScroll
from textual.reactive import reactive
from textual.widgets import Sparkline, Static


def readings_table(set_info: dict[str, Any] | None) -> Table:
    """Return a table of the set's readings: number, charge, how captured, flag marker."""
    table = Table(box=None, padding=(0, 1), show_edge=False)
    table.add_column("#", justify="right", width=2, no_wrap=True)
    table.add_column("Charge nC", justify="right", min_width=9, no_wrap=True)
    table.add_column("How", width=6, no_wrap=True)
    table.add_column("Flag", min_width=8, no_wrap=True)
    for reading in (set_info or {}).get("readings", []):
        marker = text.reading_marker(reading.get("flags") or [], bool(reading.get("settling")))
        cells = (
            reading["seq"],
            text.number(reading["charge_nC"], 4),
            reading.get("capture"),
            marker,
        )
        table.add_row(*text.plain_row(cells))
    return table


def reading_flag_lines(set_info: dict[str, Any] | None) -> list[str]:
    """Return one line per flagged reading ("#3 ! outlier ..."), then the set's own flags."""
    if not set_info:
        return []
    lines = [
        f"#{reading['seq']} {text.flag(item)}"
        for reading in set_info.get("readings", [])
        for item in reading.get("flags") or []
    ]
    return lines + text.flags_or_ok(set_info.get("flags") or [], "set: no flags")


class ReadingSetPanel(Vertical):
    """The set being taken (or just taken): table, sparkline, mean and relative SD, flags."""

    set_info: reactive[dict[str, Any] | None] = reactive(None, always_update=True)

    def compose(self) -> ComposeResult:
        yield Static("", id="set-title", classes="panel-title", markup=False)
        with VerticalScroll(id="readings-scroll"):
            yield Static("", id="readings-table", markup=False)
            yield Static("", id="set-flags", markup=False)
        yield Sparkline([], id="readings-plot")
        yield Static("", id="set-stats", markup=False)

    def watch_set_info(self, set_info: dict[str, Any] | None) -> None:
        title = "No reading set yet"
        if set_info:
            status = text.set_status(set_info["status"])
            title = f"{snapshot_view.set_title(set_info)}: {status}"
        self.query_one("#set-title", Static).update(title)
        self.query_one("#readings-table", Static).update(readings_table(set_info))
        charges = [abs(charge) for charge in snapshot_view.set_charges_nC(set_info)]
        self.query_one(Sparkline).data = charges
        self.query_one("#set-stats", Static).update(
            f"{snapshot_view.set_count_text(set_info)} · {snapshot_view.set_stats_text(set_info)}"
        )
        self.query_one("#set-flags", Static).update("\n".join(reading_flag_lines(set_info)))
