"""Recording a delivery that stopped short: the MU the treatment machine reports, and why.

Asked for the latest reading of the set shown (the one the operator just saw stop short); the
MU is checked as typed against the range of the plan's MU (``corrections.delivered_mu``:
more than 0, less than the MU planned), the daemon checks it again and records it with the
reason. The results then refer that reading to the planned MU, and the audit says so.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from chargebook.acquire.client import ConnectionLost, DaemonError
from chargebook.acquire.protocol import Method
from chargebook.corrections.delivered_mu import check_actual_MU
from chargebook.tui import checks
from chargebook.tui.screens.base import Sender
from chargebook.tui.screens.dialog_base import Dialog
from chargebook.tui.widgets.fields import Field
from textual import on, work
from textual.app import ComposeResult
from textual.containers import Vertical
from textual.widgets import Button, Input, Label, Static


def latest_reading(shown_set: Mapping[str, Any] | None) -> Mapping[str, Any] | None:
    """Return the newest reading of the set shown that is used for results, or None."""
    readings = [r for r in (shown_set or {}).get("readings") or [] if not r.get("settling")]
    return readings[-1] if readings else None


class ShortDeliveryScreen(Dialog[bool]):
    """Ask the MU delivered and why; dismissed with True once the daemon recorded it."""

    def __init__(self, send: Sender, reading: Mapping[str, Any], planned_MU: float) -> None:
        super().__init__(backed_out=False)
        self.send = send
        self.reading = dict(reading)
        self.planned_MU = planned_MU

    def compose(self) -> ComposeResult:
        label = self.reading.get("label") or self.reading.get("seq")
        with Vertical(classes="dialog"):
            yield Label("The delivery stopped short", classes="dialog-title")
            yield Static(
                f"Reading {label}: {self.reading.get('charge_nC'):+.4f} nC, "
                f"{self.planned_MU:g} MU planned. Type the MU the treatment machine reports "
                "as delivered, and why it stopped.",
                markup=False,
            )
            yield Field("MU delivered", "actual_MU", check=self._check_MU)
            yield Field("Reason", "reason", check=checks.required_text("reason"))
            yield Static("", id="short-problem", classes="dialog-warning", markup=False)
            yield self.buttons("Record (Enter)")

    def _check_MU(self, value: str) -> object:
        return check_actual_MU(checks.as_typed(value), self.planned_MU)

    @on(Input.Submitted)
    @on(Button.Pressed, "#confirm")
    def record(self) -> None:
        """Send the MU and the reason if both are acceptable."""
        fields = list(self.query(Field))
        if not all([field.recheck() for field in fields]):
            return
        values = {field.field_name: field.value for field in fields}
        self._send(float(values["actual_MU"]), values["reason"])

    @work(exclusive=True, group="short-delivery")
    async def _send(self, actual_MU: float, reason: str) -> None:
        try:
            await self.send(
                Method.READING_SHORT, reading=self.reading["id"], actual_MU=actual_MU, reason=reason
            )
        except (DaemonError, ConnectionLost) as error:
            self.query_one("#short-problem", Static).update(f"!! Not recorded: {error}")
            return
        self.dismiss(True)
