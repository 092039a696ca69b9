"""The readings of a set as fixed-width lines, drawn one screen line at a time.

The set's readings sit in a scrolling area that shows about ten of up to a hundred lines. A
``Static`` would measure and draw all of them on every new reading; this widget is exactly as
tall as its lines (no measuring) and draws only the lines on screen (Textual's line API).
"""

from __future__ import annotations

from collections.abc import Sequence

from rich.segment import Segment
from rich.style import Style
from textual.strip import Strip
from textual.widget import Widget

BOLD = Style(bold=True)


class ReadingLines(Widget):
    """Lines of plain text (never markup), the first one, the heading, in bold."""

    DEFAULT_CSS = """
    ReadingLines {
        height: auto;
    }
    """

    def __init__(self, *, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(id=id, classes=classes)
        self._lines: tuple[str, ...] = ()

    @property
    def lines(self) -> tuple[str, ...]:
        """Return the lines on show, heading first."""
        return self._lines

    def show_lines(self, lines: Sequence[str]) -> None:
        """Show ``lines`` (heading first) unless they are the lines on show already."""
        lines = tuple(lines)
        if lines == self._lines:
            return
        grew = len(lines) != len(self._lines)
        self._lines = lines
        if grew:
            self.styles.height = len(lines)  # a new height: the screen is laid out again
        self.refresh()

    def get_content_height(self, container: object, viewport: object, width: int) -> int:
        """Return the height in lines: one screen line per line of text."""
        return len(self._lines)

    def render_line(self, y: int) -> Strip:
        """Return screen line ``y``: the text cut or padded to the widget's width."""
        width = self.size.width
        style = self.rich_style
        if y >= len(self._lines):
            return Strip.blank(width, style)
        line_style = style + BOLD if y == 0 else style
        return Strip([Segment(self._lines[y], line_style)]).adjust_cell_length(width, style)
