"""Lines of text in a scrolling block, drawn one screen line at a time: the readings of a set,
and its flags.

The set's readings sit in an area that shows about ten of up to a hundred lines. A ``Static``
would measure and draw all of them on every new reading, and a scrolling container scrolled to
the newest one would repaint the whole screen. This widget keeps a line for every reading the
set will hold (no new layout of the screen as readings arrive), scrolls itself (only its own
lines are drawn again), follows the newest reading, and draws only the lines on screen
(Textual's line API). Lines not yet taken are blank.

The set's flags, whose figures change with every reading, are long sentences in a box of a few
lines: wrapped here once per change at the box's width (on spaces), and only the lines in sight
are drawn, where a ``Static`` would wrap and draw the whole text at every reading.
"""

from __future__ import annotations

import textwrap
from collections.abc import Sequence

from rich.segment import Segment
from textual.geometry import Size
from textual.scroll_view import ScrollView
from textual.strip import Strip


def wrapped(lines: Sequence[str], width: int) -> tuple[str, ...]:
    """Return ``lines`` wrapped on spaces to ``width`` characters (long words broken)."""
    if width <= 0:
        return tuple(lines)
    return tuple(
        piece
        for line in lines
        for piece in (textwrap.wrap(line, width, break_on_hyphens=False) or [""])
    )


class ReadingLines(ScrollView):
    """Lines of plain text (never markup) in a scrolling block of rows kept for them.

    ``follow``: keep the last line in sight (the newest reading); ``wrap``: wrap the lines at
    the block's width (flags), else cut them there (fixed-width columns).
    """

    DEFAULT_CSS = """
    ReadingLines {
        width: 1fr;
        height: 1fr;
        overflow-x: hidden;
        overflow-y: auto;
        scrollbar-size-vertical: 1;
    }
    """

    def __init__(
        self,
        *,
        follow: bool = True,
        wrap: bool = False,
        id: str | None = None,
        classes: str | None = None,
    ) -> None:
        super().__init__(id=id, classes=classes)
        self.follow = follow
        self.wrap = wrap
        self._given: tuple[str, ...] = ()  # the lines as given, before wrapping
        self._rows_asked = 0
        self._lines: tuple[str, ...] = ()
        self._rows = 0
        self._width = 0  # the width the lines were wrapped at

    @property
    def lines(self) -> tuple[str, ...]:
        """Return the lines on show (wrapped, when the block wraps)."""
        return self._lines

    @property
    def rows(self) -> int:
        """Return the number of lines kept for the lines shown (the scrolled height)."""
        return self._rows

    def show_lines(self, lines: Sequence[str], rows: int = 0, *, another: bool = False) -> None:
        """Show ``lines`` in ``rows`` kept lines (at least one per line); ``another``: they
        are another set's (shown from the top).

        Only the lines that changed are drawn again; the screen is laid out again only when
        the number of rows changes (a new set, or more lines than rows were kept for).
        """
        self._given, self._rows_asked = tuple(lines), rows
        self._place(another)

    def _place(self, another: bool) -> None:
        self._width = self.scrollable_content_region.width
        lines = wrapped(self._given, self._width) if self.wrap else self._given
        rows = max(self._rows_asked, len(lines))
        old, self._lines = self._lines, lines
        if rows != self._rows:
            self._rows = rows
            self.virtual_size = Size(0, rows)  # a new height: the screen is laid out again
            self.refresh()
        else:
            changed = [
                y
                for y in range(max(len(old), len(lines)))
                if y >= len(old) or y >= len(lines) or old[y] != lines[y]
            ]
            if changed:  # usually the one new reading
                self.refresh_lines(min(changed), max(changed) - min(changed) + 1)
        height = self.scrollable_content_region.height
        if another:
            self.scroll_to(y=0, animate=False)
        elif self.follow and height and len(self._lines) > self.scroll_offset.y + height:
            self.scroll_to(y=len(self._lines) - height, animate=False)

    def on_resize(self) -> None:
        """Wrap again at a new width, and keep the last line in sight when following."""
        if (self.wrap and self.scrollable_content_region.width != self._width) or self.follow:
            self._place(False)

    def render_line(self, y: int) -> Strip:
        """Return screen line ``y``: the text cut or padded to the widget's width."""
        width = self.scrollable_content_region.width
        style = self.rich_style
        index = y + self.scroll_offset.y
        if index >= len(self._lines):
            return Strip.blank(width, style)
        return Strip([Segment(self._lines[index], style)]).adjust_cell_length(width, style)
