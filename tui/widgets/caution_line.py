"""The one-line safety caution every main screen of the console keeps in view."""

from __future__ import annotations

from chargebook.tui.widgets.held_render import HeldRender
from textual.widgets import Static

#: Short enough for an 80-column terminal; the full caution is on the setup form, the summary,
#: every report and the README.
CAUTION_LINE = "Caution: supports, never replaces, a qualified medical physicist's judgement"


class CautionLine(HeldRender, Static):
    """One line above the keys: the caution, shown on every screen."""

    def __init__(self) -> None:
        super().__init__(CAUTION_LINE, id="caution-line", markup=False)
