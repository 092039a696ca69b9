"""Pick the beam, chamber and electrometer of a new session from the station's registers.

The rows come from the daemon (``register.list``); the dialog returns the chosen row ids, and
the setup screen asks the daemon what they fill (``register.pick``). Nothing is computed here.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from chargebook.tui.screens.dialog_base import Dialog
from textual import on
from textual.app import ComposeResult
from textual.containers import Vertical
from textual.widgets import Button, Label, Select, Static

#: The kinds a session picks, with their labels.
PICKED = (("beam", "Beam"), ("chamber", "Chamber"), ("electrometer", "Electrometer"))


def options(rows: Sequence[dict[str, Any]], kind: str) -> list[tuple[str, int]]:
    """Return (name, row id) of the current rows of ``kind``, as the registers name them."""
    return [(str(row["name"]), int(row["id"])) for row in rows if row["kind"] == kind]


class RegisterPickScreen(Dialog[dict[str, int] | None]):
    """Choose one beam, chamber and electrometer; dismiss with kind -> row id, or None."""

    def __init__(self, rows: Sequence[dict[str, Any]]) -> None:
        super().__init__(backed_out=None)
        self.rows = list(rows)

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog"):
            yield Label("From the station's registers", classes="dialog-title")
            yield Static(
                "Choose the beam, the chamber and the electrometer; the form is filled from "
                "the registers and the session keeps a copy of the rows.",
                markup=False,
            )
            for kind, label in PICKED:
                yield Label(label)
                yield Select(
                    options(self.rows, kind),
                    prompt=f"choose {'an' if kind[:1] in 'aeiou' else 'a'} {kind}",
                    id=f"pick-{kind}",
                    compact=True,
                )
            yield Static("", id="pick-problem", markup=False)
            yield self.buttons("Use these (Enter)")

    def on_mount(self) -> None:
        self.query_one("#pick-beam", Select).focus()

    def chosen(self) -> dict[str, int]:
        """Return kind -> row id of what is chosen so far."""
        found: dict[str, int] = {}
        for kind, _label in PICKED:
            value = self.query_one(f"#pick-{kind}", Select).value
            if isinstance(value, int):
                found[kind] = value
        return found

    @on(Button.Pressed, "#confirm")
    def confirm(self) -> None:
        """Dismiss with the chosen rows, unless one is not chosen (then say which and stay)."""
        chosen = self.chosen()
        missing = [kind for kind, _label in PICKED if kind not in chosen]
        if missing:
            self.query_one("#pick-problem", Static).update(
                f"!! choose the {' and the '.join(missing)} first"
            )
            return
        self.dismiss(chosen)
