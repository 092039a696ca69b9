"""A ``Static`` that redraws only when what it shows changed.

Every ``Static.update`` asks Textual for a new layout of the screen; at 50 readings a second
most parts of a snapshot are the same as in the one before, so drawing them again only costs
the console time it needs for the parts that did change.
"""

from __future__ import annotations

from collections.abc import Callable, Hashable
from typing import Any

from textual.widgets import Static


class TextBlock(Static):
    """Static text (never markup) that is replaced only when it differs from what is shown."""

    def __init__(self, content: str = "", **kwargs: Any) -> None:
        kwargs.setdefault("markup", False)
        super().__init__(content, **kwargs)
        self._shown_from: object = content

    def show(self, content: str) -> None:
        """Show ``content`` unless it is exactly what is on screen already."""
        if content != self._shown_from:
            self._shown_from = content
            self.update(content)

    def show_built(self, source: Hashable | object, build: Callable[[], Any]) -> None:
        """Show ``build()`` (e.g. a Rich table) unless ``source``, what it is built from, is
        equal to the source of what is on screen already."""
        if source != self._shown_from:
            self._shown_from = source
            self.update(build())
