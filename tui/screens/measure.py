"""The measurement view: the step, what to do now, the set as it arrives, results, history.

Keys and buttons come from :data:`chargebook.tui.actions.ACTIONS`; each is enabled exactly
when the daemon's snapshot allows it. Redo asks for a reason, abort asks to confirm, and a new
temperature and pressure open their own entry form, and ``m`` records that the latest reading's
delivery stopped short (the MU delivered and why). In a calibration visit, under the step, the
air entry in force, its source and its age (counted from when the values were read, flagged by
name past the visit's age limit).
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any, ClassVar

from chargebook.acquire.client import ConnectionLost, DaemonError
from chargebook.acquire.protocol import Method
from chargebook.tui import snapshot_view, visit_view
from chargebook.tui.actions import ACTIONS, ACTIONS_BY_NAME, is_allowed
from chargebook.tui.messages import ActionRequested
from chargebook.tui.screens.base import ConsoleScreen
from chargebook.tui.screens.dialogs import ConfirmScreen, redo_question
from chargebook.tui.screens.environment import EnvironmentScreen
from chargebook.tui.screens.short_delivery import ShortDeliveryScreen, latest_reading
from chargebook.tui.widgets.action_bar import ActionBar
from chargebook.tui.widgets.caution_line import CautionLine
from chargebook.tui.widgets.flag_list import FlagList, flag_count
from chargebook.tui.widgets.held_render import HeldContentSwitcher, HeldHorizontal
from chargebook.tui.widgets.history import SetHistory
from chargebook.tui.widgets.key_line import KeyLine
from chargebook.tui.widgets.plan_view import PlanView
from chargebook.tui.widgets.reading_set import ReadingSetPanel
from chargebook.tui.widgets.results_panel import ResultsPanel
from chargebook.tui.widgets.status_line import StatusLine
from chargebook.tui.widgets.step_panel import StepPanel
from chargebook.tui.widgets.tab_strip import TabStrip
from textual import on, work
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import VerticalScroll
from textual.widgets import Static

#: How often the air data's age is counted again while the screen stands still, in s.
AIR_AGE_REFRESH_S = 30.0

#: Actions that go straight to the daemon, without a question first.
DIRECT_METHODS: dict[str, str] = {
    "arm": Method.STEP_ARM,
    "capture": Method.READING_CAPTURE,
    "accept": Method.SET_ACCEPT,
    "pause": Method.SESSION_PAUSE,
    "resume": Method.SESSION_RESUME,
    "manual_done": Method.STEP_MANUAL_DONE,
    "skip": Method.STEP_SKIP,
}

TABS: tuple[tuple[str, str, str], ...] = (
    ("1", "now", "1 Now"),
    ("2", "sets", "2 Sets"),
    ("3", "plan", "3 Plan"),
    ("4", "flags", "4 Flags"),
)


class MeasureScreen(ConsoleScreen):
    """The screen for an open session: everything the operator needs at each step."""

    kind = "measure"
    _offered: tuple[bool, tuple[str, ...]] | None = None  # (watching, allowed) on the buttons
    _air_words: str | None = None  # the air line shown (None: hidden)
    BINDINGS: ClassVar[list[BindingType]] = [
        *(
            Binding(action.key, f"do('{action.name}')", action.key_help, tooltip=action.help)
            for action in ACTIONS
        ),
        *(Binding(key, f"show_tab('{tab}')", title, show=False) for key, tab, title in TABS),
        Binding("m", "short_delivery", "MU short", show=False, tooltip="A delivery stopped short"),
    ]

    def compose(self) -> ComposeResult:
        # The parts drawn at every snapshot are held, not looked up by a query each time.
        self._step_panel = StepPanel(id="step-panel")
        self._air_line = Static("", id="air-line", markup=False)
        self._air_line.display = False  # shown in a calibration visit (show_air)
        self._tab_strip = TabStrip([(name, title) for _key, name, title in TABS], "now")
        self._tabs = HeldContentSwitcher(id="measure-tabs", initial="now")
        self._set_panel = ReadingSetPanel(id="reading-set")
        self._results = ResultsPanel(id="results")
        self._action_bar = ActionBar(id="action-bar")
        yield StatusLine(id="status-line", markup=False)
        yield self._step_panel
        yield self._air_line
        yield self._tab_strip
        with self._tabs:
            with HeldHorizontal(id="now"):
                yield self._set_panel
                yield self._results
            yield SetHistory(id="sets")
            with VerticalScroll(id="plan"):
                yield PlanView(id="plan-view")
            with VerticalScroll(id="flags"):
                yield FlagList(id="flag-list", markup=False)
        yield self._action_bar
        yield CautionLine()
        yield KeyLine()

    # -- drawing, from the latest snapshot only --------------------------------------------
    def render_snapshot(self, snapshot: dict[str, Any]) -> None:
        shown_set = self._shown_set(snapshot)
        self._step_panel.connected = self.link.connected
        self._step_panel.snapshot = snapshot
        self.show_air()
        self._set_panel.set_info = shown_set
        self._draw_tab(self._tabs.current, snapshot)
        count = flag_count(shown_set, snapshot)
        self._tab_strip.relabel("flags", f"{TABS[3][2]} ({count} !)" if count else TABS[3][2])
        self._results.snapshot = snapshot
        offered = (self.watching, tuple(self.allowed()))
        if offered != self._offered:  # the buttons change only when the allowed actions do
            self._offered = offered
            self._action_bar.display = not self.watching  # a watching console offers no action
            self._action_bar.show_allowed(offered[1])

    def show_air(self) -> None:
        """Show, in a calibration visit, the air entry in force, its source and its age now."""
        visit = (self.snapshot or {}).get("visit") or {}
        words = visit_view.air_line(self.snapshot, datetime.now(UTC)) if visit else None
        if visit.get("status") != "open":
            words = None
        if words != self._air_words:  # an update lays the screen out: only when it changed
            self._air_words = words
            self._air_line.display = words is not None
            self._air_line.update(words or "")

    def on_mount(self) -> None:
        super().on_mount()
        self.set_interval(AIR_AGE_REFRESH_S, self.show_air)

    @staticmethod
    def _shown_set(snapshot: dict[str, Any]) -> dict[str, Any] | None:
        """Return the set in progress, else the latest set of the current step."""
        if snapshot.get("current_set"):
            return snapshot["current_set"]
        step_sets = [
            s for s in snapshot.get("sets") or [] if s["step_index"] == snapshot.get("step_index")
        ]
        return step_sets[-1] if step_sets else None

    # -- keys and buttons ------------------------------------------------------------------
    def offers(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """Enable an operator action only when the daemon allows it; rare ones hide instead."""
        if action != "do":
            return True
        operator_action = ACTIONS_BY_NAME[str(parameters[0])]
        if is_allowed(operator_action, self.allowed()):
            return True
        return False if operator_action.hidden_unless_allowed else None

    @on(ActionRequested)
    async def button_action(self, message: ActionRequested) -> None:
        await self.run_action(f"do('{message.name}')")

    def _draw_tab(self, tab: str | None, snapshot: dict[str, Any]) -> None:
        """Draw the tab ``tab`` (the one shown) from ``snapshot``; the other tabs are drawn
        when they are shown, not at every reading. The history and the plan grow with the
        session: drawn again only when the daemon sent them anew (a part the daemon did not
        change is the very object drawn before)."""
        if tab == "sets" and self._part_is_new("sets", snapshot):
            self.query_one(SetHistory).show_sets(snapshot.get("sets") or [])
        elif tab == "plan" and self._part_is_new("plan", snapshot):
            self.query_one(PlanView).show_plan(snapshot.get("plan") or [])
        elif tab == "flags":
            self.query_one(FlagList).show_flags(self._shown_set(snapshot), snapshot)

    @on(TabStrip.Chosen)
    def tab_clicked(self, event: TabStrip.Chosen) -> None:
        self.action_show_tab(event.tab)

    def action_show_tab(self, tab: str) -> None:
        """Show one of the tabs: the set now, the history of sets, the plan or every flag;
        a tab is drawn as it is shown, from the latest snapshot (not while hidden)."""
        if tab == self._tabs.current:
            return
        self._tabs.current = tab
        self._tab_strip.show_tab(tab)
        if self.snapshot is not None:
            self._draw_tab(tab, self.snapshot)

    def action_do(self, name: str) -> None:
        """Carry out the operator action ``name`` (see ACTIONS); questions come first."""
        questions = {
            "redo": self.ask_redo,
            "abort": self.ask_abort,
            "environment": self.ask_environment,
        }
        if name in DIRECT_METHODS:
            self.request(DIRECT_METHODS[name])
        else:
            questions[name]()

    def action_short_delivery(self) -> None:
        """Ask the MU delivered and why, for the latest reading of the set shown."""
        snapshot = self.snapshot or {}
        reading = latest_reading(self._shown_set(snapshot))
        step = snapshot_view.current_step(snapshot)
        if reading is None or step is None or not step.get("mu_per_reading"):
            self.notify("No reading with beam to correct yet.", title="Not done", timeout=6)
            return
        planned = float(step["mu_per_reading"])
        self.app.push_screen(ShortDeliveryScreen(self.send, reading, planned))

    def ask_redo(self) -> None:
        """Ask why, then redo the set (the present one is kept, marked superseded)."""

        def redo(reason: str | None) -> None:
            if reason:
                self.request(Method.SET_REDO, reason=reason)

        self.app.push_screen(redo_question(), redo)

    def ask_abort(self) -> None:
        """Ask to confirm with a reason, then abandon the session (everything is kept)."""

        def abort(reason: str | None) -> None:
            if reason:
                self.request(Method.SESSION_ABORT, reason=reason, confirm=True)

        self.app.push_screen(ConfirmScreen(), abort)

    def ask_environment(self) -> None:
        """Open the entry form for a new air temperature and pressure."""
        current = (self.snapshot or {}).get("environment")
        self.app.push_screen(EnvironmentScreen(self.send, current))

    @work(group="requests")
    async def request(self, method: str, **params: Any) -> None:
        """Send one operator action; a refusal is shown in the daemon's words."""
        try:
            await self.send(method, **params)
        except DaemonError as error:
            self.notify(str(error), title="Not done", severity="error", timeout=8)
        except ConnectionLost as error:
            self.notify(f"Not done: {error}", title="Daemon unreachable", severity="error")
