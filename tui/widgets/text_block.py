"""A ``Static`` that redraws only when what it shows changed, and lays out only when needed.

Every ``Static.update`` asks Textual for a new layout of the screen; at 50 readings a second
most parts of a snapshot are the same as in the one before, so drawing them again only costs
the console time it needs for the parts that did change. When only the wording changes (a
count, a mean, a flag's figures) and the new text, wrapped as Textual wraps it at the widget's
width, takes as many screen lines as the old, the screen needs no new layout, only a repaint.
"""

from __future__ import annotations

from collections.abc import Callable, Hashable
from typing import Any

from chargebook.tui.widgets.held_render import HeldRender
from rich.cells import cell_len
from textual.widgets import Static


class TextBlock(HeldRender, Static):
    """Static text (never markup) that is replaced only when it differs from what is shown."""

    def __init__(self, content: str = "", *, keep_height: bool = False, **kwargs: Any) -> None:
        """``keep_height``: never shrink while shown (a shorter text is padded with blank
        lines), so text whose wrapped height wavers costs no layout of the screen."""
        kwargs.setdefault("markup", False)
        super().__init__(content, **kwargs)
        self.keep_height = keep_height
        self._shown_from: object = content
        self._content: Any = content  # what is shown (what ``show_built`` built)
        self._height = (0, 0)  # (width, height in screen lines) of what is shown, measured

    def show(self, content: str) -> None:
        """Show ``content`` unless it is exactly what is on screen already."""
        if content == self._shown_from:
            return
        self._shown_from = content
        self._replace(content)

    def show_built(self, source: Hashable | object, build: Callable[[], Any]) -> None:
        """Show ``build()`` (e.g. a Rich table) unless ``source``, what it is built from, is
        equal to the source of what is on screen already."""
        if source != self._shown_from:
            self._shown_from = source
            self._replace(build())

    def _replace(self, content: Any) -> None:
        """Show ``content``; lay the screen out again only when its height in screen lines, at
        the widget's width, is not the height of what it replaces (or the widget has no width
        yet): Textual's own measure of both, so no line is ever cut off."""
        if self._height_fixed():
            self._content = content
            self.update(content, layout=False)
            return
        width = self.content_size.width
        before = self._height
        if before[0] != width:  # not measured at this width yet: the content on show now
            before = (width, self._measure(self._content, width))
        self._content = content
        self.update(content, layout=False)
        height = self._measure(content, width)
        if self.keep_height and isinstance(content, str) and 0 < height < before[1]:
            self._content = content + "\n" * (before[1] - height)  # blank lines keep the height
            self.update(self._content, layout=False)
            height = before[1]
        self._height = (width, height)
        if width <= 0 or self._height != before:  # another width is another height, to be safe
            self.refresh(layout=True)

    def _height_fixed(self) -> bool:
        """Return True when the style sheet sets the block's height in lines (``height: 2``)
        and its width other than by its content: what it shows never changes the layout."""
        height, width = self.styles.height, self.styles.width
        return height is not None and height.is_cells and not (width is not None and width.is_auto)

    def _measure(self, content: Any, width: int) -> int:
        """Return the height of ``content``, the one shown, in screen lines at ``width`` (0: no
        width): its count of lines when it is plain text none of whose lines can wrap (the
        cheap case: a count, a mean), else as Textual wraps it."""
        if width <= 0:
            return 0
        if isinstance(content, str):
            lines = content.split("\n")
            if all(cell_len(line) < width for line in lines):
                return len(lines)
        return self.visual.get_height(self.styles, width)
