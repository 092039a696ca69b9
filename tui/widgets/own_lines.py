"""Widgets that draw their own lines (Textual's line API) from one list, kept between snapshots.

At 50 readings a second, what a frame costs is the widgets Textual's compositor draws for the
part of the screen that changed: every widget that overlaps it, each through its style cache.
A panel of a dozen ``Static`` widgets costs a dozen; one widget that draws its lines itself
costs one. These widgets hold their lines as tuples of Rich segments, compare a new list with
the one shown, and mark only the lines that differ for drawing again; nothing is laid out
again unless the number of lines changes.
"""

from __future__ import annotations

import functools
import textwrap
from collections.abc import Iterable, Sequence

from chargebook.tui.widgets.held_render import HeldRender
from rich.cells import cell_len, set_cell_size
from rich.segment import Segment
from rich.style import Style
from textual.geometry import Region, Size
from textual.strip import Strip
from textual.widget import Widget

#: One screen line: its segments (text and style), drawn over the widget's own style.
Line = tuple[Segment, ...]
ELLIPSIS = "…"


def text_line(text: str, style: Style | None = None) -> Line:
    """Return ``text`` as one line in ``style`` (None: the widget's own)."""
    return (Segment(text, style),)


#: What :mod:`textwrap` turns into a space before wrapping.
_WRAP_SPACES = frozenset("\t\n\x0b\x0c\r")


def wrapped(lines: Iterable[str], width: int) -> list[str]:
    """Return ``lines`` wrapped on spaces to ``width`` cells (long words broken; no-break
    spaces kept, so a number stays with its unit)."""
    if width <= 0:
        return list(lines)
    return [piece for line in lines for piece in _wrapped_line(line, width)]


@functools.lru_cache(maxsize=512)
def _wrapped_line(line: str, width: int) -> tuple[str, ...]:
    """Return one line wrapped as :func:`textwrap.wrap` wraps it (``("",)`` for none). At
    every reading the same headings and prompts are wrapped again: they are remembered, and
    a line that fits as it is is returned without wrapping."""
    if _WRAP_SPACES.isdisjoint(line):
        words = line.split(" ")
        # textwrap drops a word of white space at a line's start or end, and breaks a word
        # longer than a line: none of that here, so it wraps word by word
        if all(len(word) <= width and word.strip() for word in words):
            return tuple(_filled(words, width))
    return tuple(textwrap.wrap(line, width, break_on_hyphens=False)) or ("",)


def _filled(words: list[str], width: int) -> list[str]:
    """Return ``words`` (none empty, none longer than ``width``) in lines of at most ``width``
    characters, one space between two words, each line as full as the next word allows."""
    lines, line = [], words[0]
    for word in words[1:]:
        if len(line) + 1 + len(word) <= width:
            line = f"{line} {word}"
        else:
            lines.append(line)
            line = word
    lines.append(line)
    return lines


def cut(text: str, width: int) -> str:
    """Return ``text`` cut to ``width`` cells, an ellipsis at its end when it was longer."""
    if cell_len(text) <= width:
        return text
    return text[: max(width - 1, 0)] + ELLIPSIS if width > 0 else ""


def at_most(lines: Sequence[str], count: int) -> list[str]:
    """Return the first ``count`` of ``lines``, the last of them ending in an ellipsis when
    some were left out."""
    if len(lines) <= count:
        return list(lines)
    kept = list(lines[:count])
    kept[-1] = kept[-1].rstrip() + ELLIPSIS
    return kept


def runs(rows: Iterable[int]) -> list[tuple[int, int]]:
    """Return ``rows`` (ascending) as runs of consecutive rows: (first, past the last)."""
    found: list[tuple[int, int]] = []
    for y in rows:
        if found and found[-1][1] == y:
            found[-1] = (found[-1][0], y + 1)
        else:
            found.append((y, y + 1))
    return found


class HeldLines:
    """The lines a widget shows, and each one's strip, built once at the widget's width."""

    def __init__(self) -> None:
        self.lines: tuple[Line, ...] = ()
        self._strips: dict[int, Strip] = {}
        self._built_for: tuple[int, Style] | None = None

    def replace(self, lines: Sequence[Line]) -> list[tuple[int, int]]:
        """Hold ``lines``; return the runs (first, past the last) of lines that changed, in
        order (none: nothing changed). A reading changes a few lines far apart (its own, the
        count): each run is drawn again, not the lines between them."""
        old, new = self.lines, tuple(lines)
        self.lines = new
        changed = [
            y
            for y in range(max(len(old), len(new)))
            if y >= len(old) or y >= len(new) or old[y] != new[y]
        ]
        for y in changed:
            self._strips.pop(y, None)
        return runs(changed)

    def strip(self, index: int, width: int, base: Style) -> Strip:
        """Return line ``index`` as a strip of ``width`` cells over ``base`` (blank past the
        last line)."""
        if self._built_for != (width, base):
            self._built_for = (width, base)
            self._strips.clear()
        held = self._strips.get(index)
        if held is None:
            line = self.lines[index] if index < len(self.lines) else ()
            held = self._strips[index] = Strip(fitted(line, width, base), width)
        return held


def fitted(line: Line, width: int, base: Style) -> list[Segment]:
    """Return ``line``'s segments over ``base``, cut or padded to ``width`` cells (one strip
    built from them, where cutting and styling a strip builds a new strip each time)."""
    segments, room = [], width
    for segment in line:
        text = segment.text
        cells = cell_len(text)
        if cells > room:
            text, cells = set_cell_size(text, room), room
        if text:
            style = base if segment.style is None else base + segment.style
            segments.append(Segment(text, style))
        room -= cells
        if room <= 0:
            break
    if room > 0:
        segments.append(Segment(" " * room, base))
    return segments


class OwnLines(HeldRender, Widget):
    """A widget drawn from :meth:`show_lines` alone, as tall as its lines unless its style
    sheet sets its height. Subclasses build their lines from what they show, at
    :attr:`line_width`, and build them again when the width changes (:meth:`rebuild`)."""

    DEFAULT_CSS = """
    OwnLines {
        height: auto;
    }
    """

    def __init__(self, *, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(id=id, classes=classes)
        self._held = HeldLines()
        self._built_at = Size(0, 0)
        self._part_styles: dict[tuple[str, object], Style] = {}

    @property
    def lines(self) -> tuple[Line, ...]:
        """Return the lines held, each a tuple of segments."""
        return self._held.lines

    @property
    def plain_lines(self) -> list[str]:
        """Return the lines held as plain text (what an operator reads)."""
        return ["".join(segment.text for segment in line) for line in self._held.lines]

    @property
    def line_width(self) -> int:
        """Return the width in cells the lines are built for (0 before the first layout)."""
        return self.content_region.width

    def show_lines(self, lines: Sequence[Line]) -> None:
        """Show ``lines``: only those that differ from the lines shown are drawn again, and
        the screen is laid out again only when their number changes."""
        count = len(self._held.lines)
        runs = self._held.replace(lines)
        if not runs:
            return
        if len(lines) != count and not self._height_fixed():
            self.refresh(layout=True)
            # and again after this frame: asked while the screen handles a resize (the first
            # lines, built as the widget gets its width), the first request is lost
            self.call_after_refresh(self.refresh, layout=True)
        else:
            width = max(self.size.width, 1)
            self.refresh(*(Region(0, first, width, past - first) for first, past in runs))

    def _height_fixed(self) -> bool:
        height = self.styles.height
        return height is not None and not height.is_auto

    def get_content_height(self, container: Size, viewport: Size, width: int) -> int:
        return len(self._held.lines)

    def render_line(self, y: int) -> Strip:
        return self._held.strip(y, self.content_region.width, self.visual_style.rich_style)

    def part_style(self, name: str) -> Style:
        """Return the style of the component class ``name`` (what it adds to the widget's),
        worked out once while the widget's styles stay the same."""
        key = (name, self.styles._cache_key)
        held = self._part_styles.get(key)
        if held is None:
            held = self._part_styles[key] = self.get_component_rich_style(name, partial=True)
        return held

    def on_resize(self) -> None:
        """Build the lines again for a new size (their wrapping depends on it)."""
        if self.content_region.size != self._built_at:
            self._built_at = self.content_region.size
            self.rebuild()

    def rebuild(self) -> None:
        """Build and show the lines again from what the widget holds."""
