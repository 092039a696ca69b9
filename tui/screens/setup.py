"""Session setup: metadata, calibration, convention, beam type, plan and MU per reading, air
temperature and pressure; and the calibration visit, when one is open.

Every entry is checked as it is typed. Start opens the session in the daemon, then records the
temperature and pressure; a refusal from the daemon appears under the entry it names. In a
visit (Ctrl+O opens one at the form's machine), Start measures the form's beam as the visit's
next beam (or a beam already planned under that name), and the last temperature and pressure,
confirmed with Ctrl+L, are carried by the daemon only if they were read recently enough.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, ClassVar

from chargebook.acquire.client import ConnectionLost, DaemonError
from chargebook.acquire.protocol import CAUTION, Method
from chargebook.tui import visit_view
from chargebook.tui.messages import SetupFinished
from chargebook.tui.screens.base import ConsoleScreen, Sender
from chargebook.tui.screens.dialogs import ReasonScreen
from chargebook.tui.screens.register_pick import RegisterPickScreen
from chargebook.tui.widgets.caution_line import CautionLine
from chargebook.tui.widgets.delivery_fields import DeliveryFields
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
        Binding("ctrl+o", "open_visit", "Open visit", priority=True),
        Binding("ctrl+k", "skip_beam", "Skip next beam", priority=True),
        Binding("ctrl+e", "close_visit", "Close visit", priority=True),
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
        yield Static("", id="visit-panel", markup=False)
        registers = Static("", id="setup-registers", markup=False)
        registers.display = False  # shown once the form is filled from the registers
        yield registers
        with VerticalScroll(id="setup-body"):
            yield SessionForm(self.defaults)
            yield DeliveryFields((self.snapshot or {}).get("plans") or [])
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

    @property
    def delivery(self) -> DeliveryFields:
        """Return the plan and MU per reading entries."""
        return self.query_one(DeliveryFields)

    @property
    def visit(self) -> dict[str, Any] | None:
        """Return the open calibration visit, or None."""
        visit = (self.snapshot or {}).get("visit")
        return visit if visit and visit.get("status") == "open" else None

    def render_snapshot(self, snapshot: dict[str, Any]) -> None:
        """Show the calibration visit (its beams and their results), if there is one."""
        lines = visit_view.visit_lines(snapshot)
        panel = self.query_one("#visit-panel", Static)
        panel.display = bool(lines)
        panel.update("\n".join(lines))
        label = (
            "Measure this beam in the visit (Ctrl+S)" if self.visit else "Start session (Ctrl+S)"
        )
        self.query_one("#start", Button).label = label

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
        if action == "open_visit":
            return self.visit is None and Method.SESSION_START in self.allowed()
        if action == "skip_beam":
            return self.visit is not None and visit_view.next_planned(self.snapshot) is not None
        if action == "close_visit":
            return self.visit is not None
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
        delivery = self.delivery.params()
        if metadata is None or environment is None or delivery is None:
            self._say("Not started: correct the entries marked !! first.")
            return
        if self.registers is not None:
            metadata["registers"] = self.registers
        self._start(metadata, environment, delivery)

    @work(exclusive=True, group="setup")
    async def _start(
        self, metadata: dict[str, Any], environment: dict[str, Any], delivery: dict[str, Any]
    ) -> None:
        self.starting = True
        try:
            if not self.session_opened:
                await self._open_session(metadata, delivery)
                self.session_opened = True
            if self.visit is not None and self.environment.confirmed_last:
                await self.send(Method.VISIT_CONFIRM_AIR)
            else:
                source = self.environment.source()
                await self.send(Method.ENVIRONMENT_SET, source=source, **environment)
        except DaemonError as error:
            if error.field == "air_max_age_min":
                self.environment.confirmed_last = False  # the values must be read again
            shown = self.form.show_refusal(error.field, error.message)
            shown = shown or self.environment.show_refusal(error.field, error.message)
            shown = shown or self.delivery.show_refusal(error.field, error.message)
            self._say("Not started: see the entry marked !!" if shown else f"!! {error}")
            return
        except ConnectionLost as error:
            self._say(f"!! Not started: {error}")
            return
        finally:
            self.starting = False
        self.session_opened = False
        self.post_message(SetupFinished())

    async def _open_session(self, metadata: dict[str, Any], delivery: dict[str, Any]) -> None:
        """Open the session: on its own, or as a beam of the open visit (added to the visit
        first unless a beam of that name is planned there already)."""
        if self.visit is None:
            await self.send(Method.SESSION_START, metadata=metadata, **delivery)
            return
        name = str(metadata.get("beam", ""))
        known = [b for b in self.visit.get("beams") or [] if b.get("name") == name]
        if not known:
            plan = {"plan": delivery["plan"]} if "plan" in delivery else {}
            typed = {k: v for k, v in metadata.items() if k != "registers"}
            registers = metadata.get("registers") or {}  # the beam's register rows, if picked
            await self.send(Method.VISIT_ADD_BEAM, metadata=typed, register_ids=registers, **plan)
        mu = {"mu_per_reading": delivery["mu_per_reading"]} if "mu_per_reading" in delivery else {}
        await self.send(Method.VISIT_START_BEAM, beam=name, **mu)

    def action_open_visit(self) -> None:
        """Open a calibration visit at the form's machine, with the form's operator."""
        metadata = self.form.metadata()
        if metadata is None:
            self._say("No visit opened: correct the entries marked !! first.")
            return
        self._request(
            Method.VISIT_START,
            machine=metadata.get("treatment_machine", ""),
            metadata={"operator": metadata.get("operator", "")},
        )

    def action_skip_beam(self) -> None:
        """Ask why, then record the visit's next planned beam as skipped."""
        beam = visit_view.next_planned(self.snapshot)
        if beam is None:
            return

        def skip(reason: str | None) -> None:
            if reason:
                self._request(Method.VISIT_SKIP_BEAM, beam=beam["name"], reason=reason)

        question = f"Why is beam {beam['name']} not measured in this visit?"
        self.app.push_screen(ReasonScreen("Skip a beam", question, "Skip beam (Enter)"), skip)

    def action_close_visit(self) -> None:
        """Ask why (beams not measured are recorded unfinished with it), then close the visit."""

        def close(reason: str | None) -> None:
            if reason:
                self._request(Method.VISIT_CLOSE, reason=reason)

        question = "Close the visit? Beams not measured are recorded unfinished, with your words."
        self.app.push_screen(ReasonScreen("Close the visit", question, "Close (Enter)"), close)

    @work(group="requests")
    async def _request(self, method: str, **params: Any) -> None:
        """Send one visit action; a refusal is said in the daemon's words."""
        try:
            await self.send(method, **params)
        except (DaemonError, ConnectionLost) as error:
            self._say(f"!! Not done: {error}")

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
