"""The modal for a new air temperature and pressure during a session."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, ClassVar

from chargebook.acquire.client import ConnectionLost, DaemonError
from chargebook.acquire.protocol import Method
from chargebook.tui.screens.base import Sender
from chargebook.tui.screens.dialog_base import Dialog
from chargebook.tui.widgets.environment_fields import EnvironmentFields
from textual import on, work
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Vertical
from textual.widgets import Button, Input, Label, Static

READ_THE_INSTRUMENTS = "Read the thermometer and barometer at the chamber, then Enter."


class EnvironmentScreen(Dialog[bool]):
    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("ctrl+t", "read_sensor", "Read the sensor", priority=True)
    ]

    """Enter a new temperature and pressure; dismissed with True once the daemon recorded them.

    A value the console or the daemon refuses stays on screen with the reason under its entry;
    nothing is sent until every entry is acceptable, and nothing recorded is touched.
    """

    def __init__(self, send: Sender, current: Mapping[str, Any] | None = None) -> None:
        super().__init__(backed_out=False)
        self.send = send
        self.current = current

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog"):
            yield Label("New air temperature and pressure", classes="dialog-title")
            yield Static(
                "Read the thermometer and barometer at the chamber, then Enter; or Ctrl+T: "
                "the daemon reads its sensor.",
                markup=False,
            )
            yield EnvironmentFields(self.current)
            yield Static("", id="environment-problem", classes="dialog-warning", markup=False)
            yield self.buttons("Record (Enter)")

    @property
    def fields(self) -> EnvironmentFields:
        """Return the temperature, pressure and humidity entries."""
        return self.query_one(EnvironmentFields)

    @on(Input.Submitted)
    @on(Button.Pressed, "#confirm")
    def record(self) -> None:
        """Send the entries to the daemon if every one is acceptable."""
        params = self.fields.params()
        if params is None:
            self._say("Not recorded: correct the entry marked !! first.")
            return
        self._send(params)

    @work(exclusive=True, group="environment")
    async def _send(self, params: dict[str, Any]) -> None:
        try:
            await self.send(Method.ENVIRONMENT_SET, **params)
        except DaemonError as error:
            if not self.fields.show_refusal(error.field, error.message):
                self._say(f"!! Not recorded: {error.message}")
            else:
                self._say("Not recorded: the daemon refused the entry marked !!.")
            return
        except ConnectionLost as error:
            self._say(f"!! Not recorded: {error}")
            return
        self.dismiss(True)

    @work(exclusive=True, group="environment")
    async def action_read_sensor(self) -> None:
        """Ask the daemon to read its environment sensor now (recorded with its source)."""
        try:
            await self.send(Method.ENVIRONMENT_READ)
        except DaemonError as error:
            self._say(f"!! Not read: {error.message}")
            return
        except ConnectionLost as error:
            self._say(f"!! Not read: {error}")
            return
        self.dismiss(True)

    def _say(self, message: str) -> None:
        self.query_one("#environment-problem", Static).update(message)
