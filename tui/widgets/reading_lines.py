"""The readings of a set as fixed-width lines, drawn one screen line at a time.

The set's readings sit in an area that shows about ten of up to a hundred lines. A ``Static``
would measure and draw all of them on every new reading, and a scrolling container scrolled to
the newest one would repaint the whole screen. This widget keeps a line for every reading the
set will hold (no new layout of the screen as readings arrive), scrolls itself (only its own
lines are drawn again), follows the newest reading, and draws only the lines on screen
(Textual's line API). Lines not yet taken are blank.
"""

from __future__ import annotations

from collections.abc import Sequence

from rich.segment import Segment
from textual.geometry import Size
from textual.scroll_view import ScrollView
from textual.strip import Strip


class ReadingLines(ScrollView):
    """Lines of plain text (never markup) in a scrolling block of rows kept for them."""

    DEFAULT_CSS = """
    ReadingLines {
        width: 1fr;
        height: 1fr;
        overflow-x: hidden;
        overflow-y: auto;
        scrollbar-size-vertical: 1;
    }
    """

    def __init__(self, *, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(id=id, classes=classes)
        self._lines: tuple[str, ...] = ()
        self._rows = 0

    @property
    def lines(self) -> tuple[str, ...]:
        """Return the lines on show."""
        return self._lines

    @property
    def rows(self) -> int:
        """Return the number of lines kept for the lines shown (the scrolled height)."""
        return self._rows

    def show_lines(self, lines: Sequence[str], rows: int = 0, *, another: bool = False) -> None:
        """Show ``lines`` in ``rows`` kept lines (at least one per line) and keep the last of
        them in sight; ``another``: they are another set's (shown from the top).

        Only the lines that changed are drawn again; the screen is laid out again only when
        the number of rows changes (a new set, or more lines than rows were kept for).
        """
        lines = tuple(lines)
        rows = max(rows, len(lines))
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
        self._follow(another)

    def _follow(self, another: bool) -> None:
        """Scroll to the top for another set, else so that the last line is in sight."""
        if another:
            self.scroll_to(y=0, animate=False)
            return
        height = self.scrollable_content_region.height
        if height and len(self._lines) > self.scroll_offset.y + height:
            self.scroll_to(y=len(self._lines) - height, animate=False)

    def on_resize(self) -> None:
        """Keep the last line in sight at the new height (and when first laid out)."""
        self._follow(False)

    def render_line(self, y: int) -> Strip:
        """Return screen line ``y``: the text cut or padded to the widget's width."""
        width = self.scrollable_content_region.width
        style = self.rich_style
        index = y + self.scroll_offset.y
        if index >= len(self._lines):
            return Strip.blank(width, style)
        return Strip([Segment(self._lines[index], style)]).adjust_cell_length(width, style)
