"""A ``Static`` that redraws only when what it shows changed, and lays out only when needed.

Every ``Static.update`` asks Textual for a new layout of the screen; at 50 readings a second
most parts of a snapshot are the same as in the one before, so drawing them again only costs
the console time it needs for the parts that did change. When only the wording of plain text
changes (a count, a mean, a flag's figures) and every line, old and new, fits the widget's
width, the text keeps its height, so the screen needs no new layout, only a repaint.
"""

from __future__ import annotations

from collections.abc import Callable, Hashable
from typing import Any

from rich.cells import cell_len
from textual.widgets import Static


def same_height(old: str, new: str, width_cells: int) -> bool:
    """Return whether plain text ``new`` takes as many screen lines as ``old`` at ``width_cells``.

    True only when both have the same number of lines and no line of either could wrap (a
    line exactly as wide as the widget is counted as possibly wrapping, to be safe).
    """
    old_lines = old.split("\n")
    new_lines = new.split("\n")
    if width_cells <= 0 or len(old_lines) != len(new_lines):
        return False
    return all(cell_len(line) < width_cells for line in (*old_lines, *new_lines))


class TextBlock(Static):
    """Static text (never markup) that is replaced only when it differs from what is shown."""

    def __init__(self, content: str = "", **kwargs: Any) -> None:
        kwargs.setdefault("markup", False)
        super().__init__(content, **kwargs)
        self._shown_from: object = content

    def show(self, content: str) -> None:
        """Show ``content`` unless it is exactly what is on screen already."""
        if content == self._shown_from:
            return
        shown = self._shown_from
        self._shown_from = content
        keeps_height = isinstance(shown, str) and same_height(
            shown, content, self.content_size.width
        )
        self.update(content, layout=not keeps_height)

    def show_built(self, source: Hashable | object, build: Callable[[], Any]) -> None:
        """Show ``build()`` (e.g. a Rich table) unless ``source``, what it is built from, is
        equal to the source of what is on screen already."""
        if source != self._shown_from:
            self._shown_from = source
            self.update(build())
