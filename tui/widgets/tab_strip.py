"""The measure screen's row of tabs ("1 Now  2 Sets  3 Plan  4 Flags (7 !)"): one line, one
widget.

Textual's tabbed container draws its row of tabs as nine widgets (the tabs, their rows, the
underline), every one drawn again at every frame a reading changes the screen, and lays the
screen out again when a label changes. This strip draws the labels in one line of its own,
the tab shown in reverse video and bold (not by colour alone); a new label (the count of
flags) redraws that line only.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import ClassVar

from chargebook.tui.widgets.own_lines import OwnLines
from rich.segment import Segment
from textual import events
from textual.message import Message

#: Cells between two labels (each label has a space either side besides).
GAP = 1


class TabStrip(OwnLines):
    """One line of tab labels; a click on a label posts :class:`TabStrip.Chosen`."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {"tab-strip--active", "tab-strip--other"}
    DEFAULT_CSS = """
    TabStrip { height: 1; padding: 0 1; }
    TabStrip > .tab-strip--active { text-style: bold reverse; }
    TabStrip > .tab-strip--other { color: $text-muted; }
    """

    class Chosen(Message):
        """The operator clicked the label of the tab ``tab``."""

        def __init__(self, tab: str) -> None:
            super().__init__()
            self.tab = tab

    def __init__(self, tabs: Sequence[tuple[str, str]], active: str, *, id: str | None = None):
        """``tabs``: (name, label) in order; ``active``: the name of the tab shown."""
        super().__init__(id=id)
        self._labels = dict(tabs)
        self.active = active

    def label(self, tab: str) -> str:
        """Return the label of the tab ``tab``."""
        return self._labels[tab]

    def relabel(self, tab: str, label: str) -> None:
        """Give the tab ``tab`` the label ``label`` (its line is drawn again if it changed)."""
        if self._labels[tab] != label:
            self._labels[tab] = label
            self.rebuild()

    def show_tab(self, tab: str) -> None:
        """Mark the tab ``tab`` as the one shown."""
        if tab != self.active:
            self.active = tab
            self.rebuild()

    def on_mount(self) -> None:
        self.rebuild()

    def rebuild(self) -> None:
        """Draw the labels in one line, the tab shown marked."""
        active, other = self.part_style("tab-strip--active"), self.part_style("tab-strip--other")
        segments: list[Segment] = []
        for name, label in self._labels.items():
            segments.append(Segment(f" {label} ", active if name == self.active else other))
            segments.append(Segment(" " * GAP))
        self.show_lines([tuple(segments)])

    def tab_at(self, x: int) -> str | None:
        """Return the tab whose label is at cell ``x`` of the line (None: between labels)."""
        start = 0
        for name, label in self._labels.items():
            end = start + len(label) + 2
            if start <= x < end:
                return name
            start = end + GAP
        return None

    def on_click(self, event: events.Click) -> None:
        tab = self.tab_at(event.x - self.styles.padding.left)
        if tab is not None:
            self.post_message(self.Chosen(tab))
