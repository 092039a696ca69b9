"""The history of reading sets, superseded and interrupted ones included, with the reasons."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from chargebook.tui import snapshot_view, text
from textual.widgets import DataTable

COLUMNS = ("Step", "Set", "Status", "Mean", "Rel. SD")


class SetHistory(DataTable):
    """One row per reading set in the order taken; a redo shows both the old and the new set."""

    def on_mount(self) -> None:
        self.cursor_type = "row"
        self.zebra_stripes = True
        self.add_columns(*COLUMNS)

    def show_sets(self, sets: Sequence[dict[str, Any]]) -> None:
        """Replace the rows with the given sets (``Snapshot.sets``)."""
        rows = snapshot_view.history_rows(sets)
        if rows == getattr(self, "_shown_rows", None):
            return
        self._shown_rows = rows
        self.clear()
        self.add_rows([text.plain_row(row) for row in rows])
