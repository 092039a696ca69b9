"""Modal questions: why a set is redone, and whether to abandon the session.

Each returns what the operator decided through ``dismiss`` (the reason text, or None when the
operator backs out); the measure screen sends it to the daemon.
"""

from __future__ import annotations

from chargebook.tui.checks import required_text
from chargebook.tui.screens.dialog_base import Dialog
from chargebook.tui.widgets.fields import Field
from textual import on
from textual.app import ComposeResult
from textual.containers import Vertical
from textual.widgets import Button, Input, Label, Static


class ReasonScreen(Dialog[str | None]):
    """Ask for a reason in words; dismiss with it, or with None if the operator backs out."""

    def __init__(self, title: str, question: str, confirm_label: str, *, warning: str = "") -> None:
        super().__init__(backed_out=None)
        self.dialog_title = title
        self.question = question
        self.confirm_label = confirm_label
        self.warning = warning

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog"):
            yield Label(self.dialog_title, classes="dialog-title")
            if self.warning:
                yield Static(self.warning, classes="dialog-warning", markup=False)
            yield Static(self.question, markup=False)
            yield Field("Reason", "reason", check=required_text("reason"))
            yield self.buttons(self.confirm_label)

    @property
    def reason_field(self) -> Field:
        """Return the reason entry."""
        return self.query_one(Field)

    @on(Input.Submitted)
    @on(Button.Pressed, "#confirm")
    def confirm(self) -> None:
        """Dismiss with the reason, unless it is empty (then say so and stay)."""
        if not self.reason_field.recheck():
            return
        self.dismiss(self.reason_field.value)


class ConfirmScreen(ReasonScreen):
    """Ask the operator to confirm abandoning the session, with a reason; None backs out."""

    def __init__(self) -> None:
        super().__init__(
            "Abort the session?",
            "Give the reason and press Enter to abort. Back keeps measuring.",
            "Abort session (Enter)",
            warning="!! Aborting ends this session. Everything recorded is kept, marked "
            "aborted; the measurement cannot be continued.",
        )


def redo_question() -> ReasonScreen:
    """Return the dialog that asks why the current set is taken again."""
    return ReasonScreen(
        "Redo this reading set",
        "Why is this set taken again? The present set is kept, marked superseded, with "
        "your reason.",
        "Redo set (Enter)",
    )
