"""A panel drawn from what a screen hands it, once its own parts exist."""

from __future__ import annotations

from typing import Any


class DrawnWhenComposed:
    """Mixin, before its widget class, of a panel the screen feeds through a reactive.

    What the panel holds can arrive before it has composed its parts, or while its screen is
    being taken down (both seen on a loaded machine, where a query for a missing part stopped
    the console). The reactive's watcher calls :meth:`redraw`; the panel draws itself again
    once mounted. A mixin, not a Widget: a Widget base would hide what its container class
    sets (``can_focus``)."""

    children: Any
    call_after_refresh: Any

    def on_mount(self) -> None:
        self.call_after_refresh(self.redraw)  # what came before the parts existed

    def redraw(self) -> None:
        """Draw what the panel holds, if its parts exist."""
        if self.children:
            self._draw_held()

    def _draw_held(self) -> None:
        raise NotImplementedError
