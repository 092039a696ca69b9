"""Session setup: metadata, calibration, convention, beam type, air temperature and pressure.

Every entry is checked as it is typed. Start opens the session in the daemon, then records the
temperature and pressure; a refusal from the daemon appears under the entry it names.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, ClassVar

from chargebook.acquire.client import ConnectionLost, DaemonError
from chargebook.acquire.protocol import CAUTION, Method
from chargebook.tui.messages import SetupFinished
from chargebook.tui.screens.base import ConsoleScreen, Sender
from chargebook.tui.screens.register_pick import RegisterPickScreen
from chargebook.tui.widgets.caution_line import CautionLine
from chargebook.tui.widgets.environment_fields import EnvironmentFields
from chargebook.tui.widgets.session_form import SessionForm
from chargebook.tui.widgets.status_line import StatusLine
from textual import on, work
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import VerticalScroll
from textual.widgets import Button, Footer, Input, Static

INTRO = (
    "New session. Ctrl+R picks the beam, chamber and electrometer from the registers; check "
    "each entry (Tab moves on), then press Ctrl+S to start."
)


class SetupScreen(ConsoleScreen):
    """The form for a new session; stays up until the daemon has the session and the air data."""

    kind = "setup"
    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("ctrl+s", "start", "Start session", priority=True),
        Binding("ctrl+l", "use_last_entry", "Use last T & P", priority=True),
        Binding("ctrl+r", "pick_registers", "From registers", priority=True),
    ]

    def __init__(self, send: Sender, defaults: Mapping[str, Any] | None = None) -> None:
        super().__init__(send)
        self.defaults = dict(defaults or {})
        self.starting = False  # a request to the daemon is under way
        self.session_opened = False  # this form opened the session; the air data are still due
        self.problem_said = False  # "Not started: ..." is on screen
        #: The register rows the form was filled from (kind -> row id), sent with the metadata.
        self.registers: dict[str, int] | None = self.defaults.pop("registers", None)

    def compose(self) -> ComposeResult:
        yield StatusLine(id="status-line", markup=False)
        yield Static(INTRO, id="setup-intro", markup=False)
        registers = Static("", id="setup-registers", markup=False)
        registers.display = False  # shown once the form is filled from the registers
        yield registers
        with VerticalScroll(id="setup-body"):
            yield SessionForm(self.defaults)
            yield Static("Air at the chamber", classes="section-title", markup=False)
            yield EnvironmentFields(self.defaults, ask_again=True)
            yield Static(f"Caution: {CAUTION}", id="setup-caution", markup=False)
            yield Button("Start session (Ctrl+S)", id="start", variant="primary", compact=True)
        yield Static("", id="setup-problem", markup=False)
        yield CautionLine()
        yield Footer(compact=True, show_command_palette=False)

    @property
    def form(self) -> SessionForm:
        """Return the session details form."""
        return self.query_one(SessionForm)

    @property
    def environment(self) -> EnvironmentFields:
        """Return the temperature and pressure entries."""
        return self.query_one(EnvironmentFields)

    def holds_screen(self) -> bool:
        """Stay up while the session is being started, until the air data are recorded too."""
        return self.starting or self.session_opened

    def offers(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """Offer Start when the daemon has no session open (or this form opened it), and the
        last temperature and pressure when there is one to confirm."""
        if action == "start":
            return Method.SESSION_START in self.allowed() or self.session_opened or None
        if action == "use_last_entry":
            return self.environment.last_entry is not None
        if action == "pick_registers":
            return Method.SESSION_START in self.allowed() or None
        return True

    @work(exclusive=True, group="registers")
    async def action_pick_registers(self) -> None:
        """Ask the daemon for the registers, let the operator choose, then fill the form."""
        try:
            listed = await self.send(Method.REGISTER_LIST)
        except (DaemonError, ConnectionLost) as error:
            self._say(f"!! The registers cannot be read: {error}")
            return
        if not any(row["kind"] == "beam" for row in listed["rows"]):
            self._say("The registers hold no beam yet: add one with `chargebook register add`.")
            return
        chosen = await self.app.push_screen_wait(RegisterPickScreen(listed["rows"]))
        if chosen is not None:
            await self._fill_from_registers(chosen)

    def on_mount(self) -> None:
        """Fill the form from the register rows the console was started with (the demo's)."""
        if self.registers is not None:
            self._fill_on_mount(self.registers)

    @work(exclusive=True, group="registers")
    async def _fill_on_mount(self, chosen: dict[str, int]) -> None:
        await self._fill_from_registers(chosen)

    async def _fill_from_registers(self, chosen: dict[str, int]) -> None:
        """Ask the daemon what the rows fill, fill the form, and say what they are."""
        try:
            picked = await self.send(Method.REGISTER_PICK, registers=chosen)
        except (DaemonError, ConnectionLost) as error:
            self._say(f"!! {error}")
            return
        self.form.fill(picked["fields"])
        self.registers = picked["registers"]
        shown = self.query_one("#setup-registers", Static)
        shown.update(register_words(picked))
        shown.display = True

    def action_use_last_entry(self) -> None:
        """Use the last temperature and pressure again, recorded as confirmed by the operator."""
        self.environment.use_last_entry()

    @on(Input.Changed)
    def entry_changed(self) -> None:
        """Clear "Not started: correct the entries" once every entry is right."""
        if self.problem_said and self.form.is_valid() and self.environment.is_valid():
            self._say("")

    @on(Button.Pressed, "#start")
    def action_start(self) -> None:
        """Check every entry, then open the session and record the air data."""
        metadata = self.form.metadata()
        environment = self.environment.params()
        if metadata is None or environment is None:
            self._say("Not started: correct the entries marked !! first.")
            return
        if self.registers is not None:
            metadata["registers"] = self.registers
        self._start(metadata, environment)

    @work(exclusive=True, group="setup")
    async def _start(self, metadata: dict[str, Any], environment: dict[str, Any]) -> None:
        self.starting = True
        try:
            if not self.session_opened:
                await self.send(Method.SESSION_START, metadata=metadata)
                self.session_opened = True
            source = self.environment.source()
            await self.send(Method.ENVIRONMENT_SET, source=source, **environment)
        except DaemonError as error:
            shown = self.form.show_refusal(error.field, error.message)
            shown = shown or self.environment.show_refusal(error.field, error.message)
            self._say("Not started: see the entry marked !!" if shown else f"!! {error}")
            return
        except ConnectionLost as error:
            self._say(f"!! Not started: {error}")
            return
        finally:
            self.starting = False
        self.session_opened = False
        self.post_message(SetupFinished())

    def _say(self, message: str) -> None:
        self.problem_said = bool(message)
        self.query_one("#setup-problem", Static).update(message)


def register_words(picked: Mapping[str, Any]) -> str:
    """Return what the form was filled from, in words: the rows, the certificate's date, and
    each warning the daemon gave (marked !!)."""
    fields = picked["fields"]
    lines = [
        f"From the registers: {fields['treatment_machine']} {fields['beam']}, chamber "
        f"{fields['chamber_serial']}, electrometer {fields['electrometer_serial']}; "
        + (
            f"certificate {fields['certificate']} of {fields['calibration_date']}"
            if fields.get("calibration_date")
            else "no certificate"
        )
    ]
    lines += [f"!! {warning}" for warning in picked["warnings"]]
    return "\n".join(lines)
