"""Widgets that keep what they rendered from one frame to the next (issue 17, target 1).

At every frame that changes any part of the screen, Textual's compositor renders every widget
the changed part's container holds, whole (only then are the lines that changed picked out),
each through its style cache: its background worked out from every ancestor, then each of its
lines looked up and passed through the app's colour filters. At 50 readings a second a frame
changes a few lines of one panel, and the rest of the screen cost as much again as them.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from textual.containers import Horizontal
from textual.geometry import Region
from textual.strip import Strip
from textual.widget import Widget
from textual.widgets import ContentSwitcher

if TYPE_CHECKING:
    _Mixin = Widget
else:
    _Mixin = object  # not a node itself: Textual takes a widget's style sheet from its first
    # node base, which must stay the widget class it is mixed into (Static, Horizontal...)


class HeldRender(_Mixin):
    """A widget whose rendered lines are kept from one frame to the next until it is marked
    for drawing again: what the last render returned is returned again while the widget has
    not been marked dirty since (every refresh, style change and new size goes through
    ``_set_dirty``, where the style cache itself learns what to draw again), for the same
    part of the widget, at the same size, through the same filters. Put it first among a
    widget's bases, before the widget class."""

    _rendered: tuple[object, list[Strip]] | None = None
    _rows_dirty: frozenset[int] | set[int] = frozenset()  # rows marked since, of the content

    def _set_dirty(self, *regions: Region) -> None:
        super()._set_dirty(*regions)
        if not regions or self._rendered is None:
            self._rendered = None  # all of it: rendered again whole
            return
        if not isinstance(self._rows_dirty, set):
            self._rows_dirty = set()
        for region in regions:  # the content's rows, as Textual takes them
            self._rows_dirty.update(region.line_range)

    def render_lines(self, crop: Region) -> list[Strip]:
        """Return the lines of ``crop`` (a region of the widget): those kept from the last
        render, with the rows marked dirty since rendered again (all of them when the part,
        the size or the filters changed, or the whole widget was marked)."""
        key = (crop, tuple(self.get_line_filters()))  # a new size marks all of it dirty
        held, dirty = self._rendered, self._rows_dirty
        self._rows_dirty = frozenset()
        if held is None or held[0] != key:
            strips = super().render_lines(crop)
        else:
            strips = held[1]
            top = self.content_offset.y if dirty else 0  # the content's first row
            wanted = [y for y in crop.line_range if y - top in dirty]
            if wanted:
                # one render from the first row marked to the last: the style cache draws
                # the rows marked and looks the rows between up, and a render costs more
                # (the background from every ancestor...) than a row looked up
                first, past = wanted[0], wanted[-1] + 1
                strips = list(strips)
                part = Region(crop.x, first, crop.width, past - first)
                strips[first - crop.y : past - crop.y] = super().render_lines(part)
        self._rendered = (key, strips)
        return strips


class HeldHorizontal(HeldRender, Horizontal):
    """A :class:`~textual.containers.Horizontal` that keeps what it rendered (its background)."""


class HeldContentSwitcher(HeldRender, ContentSwitcher):
    """A :class:`~textual.widgets.ContentSwitcher` that keeps what it rendered."""
