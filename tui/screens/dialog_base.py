"""What every modal question of the console shares: Escape backs out, the first entry has the
cursor, and a row of two buttons (do it, or back)."""

from __future__ import annotations

from typing import ClassVar, Generic, TypeVar

from textual import on
from textual.binding import Binding, BindingType
from textual.containers import Horizontal
from textual.screen import ModalScreen
from textual.widgets import Button, Input

ResultType = TypeVar("ResultType")


class Dialog(ModalScreen[ResultType], Generic[ResultType]):
    """A modal question; backing out (Escape or Back) dismisses with :attr:`backed_out`."""

    BINDINGS: ClassVar[list[BindingType]] = [Binding("escape", "back", "Back", show=True)]

    def __init__(self, backed_out: ResultType) -> None:
        super().__init__(classes="dialog-screen")
        self.backed_out = backed_out

    def on_mount(self) -> None:
        entries = self.query(Input)
        if entries:
            entries.first().focus()

    @staticmethod
    def buttons(confirm_label: str) -> Horizontal:
        """Return the row with the confirm button (id ``confirm``) and Back (id ``back``)."""
        return Horizontal(
            Button(confirm_label, id="confirm", variant="primary", compact=True),
            Button("Back (Esc)", id="back", compact=True),
            classes="dialog-buttons",
        )

    @on(Button.Pressed, "#back")
    def action_back(self) -> None:
        """Leave without sending anything to the daemon."""
        self.dismiss(self.backed_out)
