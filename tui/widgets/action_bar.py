"""A row of buttons, one per operator action, for the mouse; enabled as the daemon allows."""

from __future__ import annotations

from collections.abc import Iterable

from chargebook.tui.actions import ACTIONS, is_allowed
from chargebook.tui.messages import ActionRequested
from textual.app import ComposeResult
from textual.containers import Horizontal
from textual.widgets import Button


class ActionBar(Horizontal):
    """One button per action (its key is in the key help); a click posts ActionRequested."""

    def compose(self) -> ComposeResult:
        for action in ACTIONS:
            yield Button(
                action.label,
                id=f"do-{action.name}",
                tooltip=action.help,
                compact=True,
                disabled=True,
            )

    def show_allowed(self, allowed: Iterable[str], connected: bool = True) -> None:
        """Enable exactly the buttons whose action the daemon allows now."""
        allowed = list(allowed) if connected else []
        for action in ACTIONS:
            button = self.query_one(f"#do-{action.name}", Button)
            enabled = is_allowed(action, allowed)
            button.disabled = not enabled
            button.display = enabled or not action.hidden_unless_allowed

    def on_button_pressed(self, event: Button.Pressed) -> None:
        event.stop()
        if event.button.id and event.button.id.startswith("do-"):
            self.post_message(ActionRequested(event.button.id.removeprefix("do-")))
