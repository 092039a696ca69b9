"""A row of buttons, one per operator action, for the mouse; enabled as the daemon allows.

One widget drawing the row as one line of its own (see :mod:`chargebook.tui.widgets.own_lines`):
a row of button widgets was laid out again whenever an action came or went (pause, resume and
skip are shown only while allowed), at every start and end of a set while readings arrive.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import ClassVar

from chargebook.tui.actions import ACTIONS, OperatorAction, is_allowed
from chargebook.tui.messages import ActionRequested
from chargebook.tui.widgets.own_lines import OwnLines
from rich.segment import Segment
from textual import events


class ActionBar(OwnLines):
    """One button per action (its key is in the key help); a click on an enabled one posts
    ActionRequested; the mouse over a button shows what it does."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {"action-bar--on", "action-bar--off"}
    DEFAULT_CSS = """
    ActionBar { height: 1; }
    ActionBar > .action-bar--on { background: $surface-lighten-1; text-style: bold; }
    ActionBar > .action-bar--off { background: $surface; text-style: dim; }
    """

    def __init__(self, *, id: str | None = None) -> None:
        super().__init__(id=id)
        self._shown = [(action, False) for action in ACTIONS if not action.hidden_unless_allowed]
        self._places: list[tuple[int, int, OperatorAction, bool]] = []

    def show_allowed(self, allowed: Iterable[str], connected: bool = True) -> None:
        """Enable exactly the buttons whose action the daemon allows now; a rare action is
        shown only while allowed."""
        allowed = list(allowed) if connected else []
        shown = [(action, is_allowed(action, allowed)) for action in ACTIONS]
        self._shown = [(act, on) for act, on in shown if on or not act.hidden_unless_allowed]
        self.rebuild()

    def on_mount(self) -> None:
        self.rebuild()

    def rebuild(self) -> None:
        """Draw the buttons: each label with a space either side, one cell between two."""
        on, off = self.part_style("action-bar--on"), self.part_style("action-bar--off")
        styles = {True: on, False: off}
        segments: list[Segment] = []
        places, cell = [], 0
        for action, enabled in self._shown:
            label = f" {action.label} "
            segments += [Segment(label, styles[enabled]), Segment(" ")]
            places.append((cell, cell + len(label), action, enabled))
            cell += len(label) + 1
        self._places = places
        self.show_lines([tuple(segments)])

    def button_at(self, x: int) -> tuple[OperatorAction, bool] | None:
        """Return (the action, whether enabled) of the button at cell ``x`` (None: none)."""
        for first, past, action, enabled in self._places:
            if first <= x < past:
                return action, enabled
        return None

    def place_of(self, name: str) -> int:
        """Return the cell where the button of the action ``name`` starts."""
        return next(first for first, _past, action, _on in self._places if action.name == name)

    def on_click(self, event: events.Click) -> None:
        event.stop()
        hit = self.button_at(event.x - self.styles.padding.left)
        if hit is not None and hit[1]:
            self.post_message(ActionRequested(hit[0].name))

    def on_mouse_move(self, event: events.MouseMove) -> None:
        hit = self.button_at(event.x - self.styles.padding.left)
        self.tooltip = hit[0].help if hit is not None else None
