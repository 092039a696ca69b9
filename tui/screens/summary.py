"""The summary at the end of a session: what was measured, every factor, the dose, the caution."""

from __future__ import annotations

from typing import Any, ClassVar

from chargebook.acquire.client import ConnectionLost, DaemonError
from chargebook.acquire.protocol import CAUTION, Method
from chargebook.tui import snapshot_view, text, visit_view
from chargebook.tui.screens.base import ConsoleScreen
from chargebook.tui.widgets.results_panel import factor_table, results_table
from chargebook.tui.widgets.status_line import StatusLine
from rich.table import Table
from textual import work
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import VerticalScroll
from textual.widgets import Footer, Static

#: Metadata shown in the summary, with its label.
DETAILS: tuple[tuple[str, str], ...] = (
    ("treatment_machine", "Machine"),
    ("beam", "Beam"),
    ("beam_type", "Beam type"),
    ("convention", "Convention"),
    ("chamber_model", "Chamber"),
    ("chamber_serial", "Chamber serial"),
    ("electrometer_serial", "Electrometer serial"),
    ("operator", "Operator"),
)


def summary_title(snapshot: dict[str, Any]) -> str:
    """Return "Session 12 finished" or "Session 12 ABORTED: <reason>"."""
    session = snapshot.get("session") or {}
    name = f"Session {session.get('id', '?')}"
    if snapshot.get("state") == "aborted":
        reason = session.get("reason")
        return f"!! {name} ABORTED" + (f": {reason}" if reason else "")
    return f"{name} finished"


def details_table(snapshot: dict[str, Any]) -> Table:
    """Return the session's details and its latest air temperature and pressure."""
    session = snapshot.get("session") or {}
    metadata = session.get("metadata") or {}
    table = Table(box=None, padding=(0, 1), show_header=False, show_edge=False)
    table.add_column("What")
    table.add_column("Value")
    for key, label in DETAILS:
        if metadata.get(key):
            shown = text.convention(metadata[key]) if key == "convention" else metadata[key]
            table.add_row(*text.plain_row((label, shown)))
    table.add_row(*text.plain_row(("Started", text.local_time(session.get("created_at")))))
    environment = snapshot.get("environment")
    if environment:
        entered = ""
        if environment.get("pressure_unit") not in (None, "kPa"):
            entered = (
                f" (entered {environment['pressure_entered']:g} {environment['pressure_unit']})"
            )
        air = (
            f"{text.number(environment['temperature_C'], 1, '°C')}, "
            f"{text.number(environment['pressure_kPa'], 3, 'kPa')}{entered}"
        )
        table.add_row(*text.plain_row(("Air", air)))
    return table


def history_table(snapshot: dict[str, Any]) -> Table:
    """Return every reading set of the session, superseded ones included."""
    table = Table(box=None, padding=(0, 1), show_edge=False, expand=True)
    for column in ("Step", "Set", "Status", "Mean", "Rel. SD"):
        table.add_column(column)
    for row in snapshot_view.history_rows(snapshot.get("sets") or []):
        table.add_row(*text.plain_row(row))
    return table


class SummaryScreen(ConsoleScreen):
    """The end of a session: results as the daemon computed them, flags, history, caution."""

    kind = "summary"
    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("n", "new_session", "New session", tooltip="Leave this session; set up another"),
    ]

    def compose(self) -> ComposeResult:
        yield StatusLine(id="status-line", markup=False)
        with VerticalScroll(id="summary-body"):
            yield Static("", id="summary-title", classes="panel-title", markup=False)
            yield Static("", id="summary-visit", markup=False)
            yield Static("", id="summary-results", markup=False)
            yield Static("", id="summary-factors", markup=False)
            yield Static("", id="summary-flags", markup=False)
            yield Static("", id="summary-details", markup=False)
            yield Static("Reading sets", classes="panel-title", markup=False)
            yield Static("", id="summary-history", markup=False)
        yield Static("", id="summary-caution", markup=False)
        yield Footer(compact=True, show_command_palette=False)

    def render_snapshot(self, snapshot: dict[str, Any]) -> None:
        self.query_one("#summary-title", Static).update(summary_title(snapshot))
        visit = self.query_one("#summary-visit", Static)
        lines = visit_view.visit_lines(snapshot)
        visit.display = bool(lines)
        visit.update("\n".join(lines))
        self.query_one("#summary-details", Static).update(details_table(snapshot))
        self.query_one("#summary-factors", Static).update(factor_table(snapshot.get("results")))
        self.query_one("#summary-results", Static).update(results_table(snapshot))
        flags = text.flags_or_ok(snapshot_view.session_flags(snapshot), "session: no flags")
        self.query_one("#summary-flags", Static).update("\n".join(flags))
        self.query_one("#summary-history", Static).update(history_table(snapshot))
        self.query_one("#summary-caution", Static).update(
            f"Caution: {snapshot.get('caution') or CAUTION}"
        )

    def offers(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """Offer a new session only when the daemon allows closing this one."""
        if action == "new_session":
            return Method.SESSION_CLOSE in self.allowed() or None
        return True

    @work(group="requests")
    async def action_new_session(self) -> None:
        """Close the finished session in the daemon; the console then shows the setup form."""
        try:
            await self.send(Method.SESSION_CLOSE)
        except (DaemonError, ConnectionLost) as error:
            self.notify(f"Not done: {error}", title="Not done", severity="error")
