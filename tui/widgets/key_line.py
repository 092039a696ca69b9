"""The key help at the foot of the measure screen ("a Arm c Capture k Accept ... ^q Quit"): one
line drawn by one widget.

Textual's footer composes one widget per key again whenever the keys offered change (at every
start and end of a set), mounting and styling a dozen widgets and laying the screen out while
readings keep arriving. This line is drawn again from the screen's bindings instead: a key the
daemon does not allow now is shown dimmed, a rare one it does not allow is left out (as the
screen's ``check_action`` says), and a click on a key presses it.
"""

from __future__ import annotations

from typing import ClassVar

from chargebook.tui.widgets.own_lines import OwnLines
from rich.segment import Segment
from textual import events
from textual.screen import Screen


class KeyLine(OwnLines):
    """One line of the keys the screen offers now, each with what it does."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {"key-line--key", "key-line--off"}
    DEFAULT_CSS = """
    KeyLine {
        height: 1;
        background: $footer-background;
        color: $footer-description-foreground;
    }
    KeyLine > .key-line--key { color: $footer-key-foreground; text-style: bold; }
    KeyLine > .key-line--off { text-style: dim; }
    """

    def __init__(self, *, id: str | None = None) -> None:
        super().__init__(id=id)
        self._places: list[tuple[int, int, str]] = []  # (first cell, past the last, key)

    def on_mount(self) -> None:
        self.screen.bindings_updated_signal.subscribe(self, self._keys_changed)
        self.rebuild()

    def _keys_changed(self, _screen: Screen) -> None:
        self.rebuild()

    def rebuild(self) -> None:
        """Draw the keys the screen offers now, in the order they were bound."""
        key_style, off = self.part_style("key-line--key"), self.part_style("key-line--off")
        segments: list[Segment] = []
        places, cell = [], 0
        shown: set[str] = set()
        for _node, binding, enabled, _tooltip in self.screen.active_bindings.values():
            if not binding.show or binding.action in shown:
                continue
            shown.add(binding.action)
            key = self.app.get_key_display(binding)
            words = f" {binding.description}"
            segments.append(Segment(key, key_style if enabled else key_style + off))
            segments.append(Segment(words, None if enabled else off))
            segments.append(Segment(" "))
            places.append((cell, cell + len(key) + len(words), binding.key))
            cell += len(key) + len(words) + 1
        self._places = places
        self.show_lines([tuple(segments)])

    def key_at(self, x: int) -> str | None:
        """Return the key drawn at cell ``x`` of the line (None: between keys)."""
        return next((key for first, past, key in self._places if first <= x < past), None)

    def on_click(self, event: events.Click) -> None:
        key = self.key_at(event.x)
        if key is not None:
            self.app.simulate_key(key)
