"""The operator console: a Textual app attached to the daemon, holding no measurement state.

``ConsoleApp`` keeps one connection to the daemon in a background worker: it subscribes, passes
every snapshot down to the screen that shows it, and reconnects with backoff when the daemon
goes away ("Not connected to the daemon — retrying…"). Operator actions are requests sent
through :meth:`ConsoleApp.call_daemon`. Closing the console never stops a measurement.
"""

from __future__ import annotations

import asyncio
import gc
import os
import stat
import sys
from collections.abc import Awaitable, Callable, Mapping
from pathlib import Path
from typing import Any, ClassVar

from chargebook.acquire.client import ConnectionLost, DaemonClient, DaemonError
from chargebook.acquire.protocol import NOTIFY_SNAPSHOT, Method
from chargebook.tui import snapshot_view
from chargebook.tui.messages import LinkChanged, LinkStatus, SetupFinished, SnapshotArrived
from chargebook.tui.screens.base import ConsoleScreen
from chargebook.tui.screens.measure import MeasureScreen
from chargebook.tui.screens.setup import SetupScreen
from chargebook.tui.screens.summary import SummaryScreen
from chargebook.tui.widgets.status_line import NOT_CONNECTED
from textual import on, work
from textual.app import App, ComposeResult
from textual.binding import Binding, BindingType
from textual.screen import ModalScreen
from textual.widgets import Static

#: Opens a connection to the daemon at a socket path (``DaemonClient.connect`` by default).
ClientFactory = Callable[[str], Awaitable[DaemonClient]]

#: First and longest wait between attempts to reach the daemon, in seconds.
RETRY_FIRST_S = 0.2
RETRY_LONGEST_S = 2.0
#: How many times the console tries to reach a daemon it has not reached yet (about 9 s in
#: all, for a daemon still starting) before it says no daemon listens there and exits. Once
#: attached, it retries for ever: a daemon that goes away mid-session is being restarted.
FIRST_ATTEMPTS = 8


class ConsoleApp(App[int]):
    """The console. Give it the daemon's socket path (or a client factory) and run it."""

    TITLE = "chargebook console"
    CSS_PATH = "console.tcss"
    ENABLE_COMMAND_PALETTE = False
    BINDINGS: ClassVar[list[BindingType]] = [
        Binding(
            "ctrl+q", "quit", "Quit", priority=True, tooltip="Close the console; measuring goes on"
        )
    ]

    def __init__(
        self,
        socket_path: str | Path,
        *,
        operator: str | None = None,
        setup_defaults: Mapping[str, Any] | None = None,
        client_factory: ClientFactory | None = None,
        watch: bool = False,
        first_attempts: int = FIRST_ATTEMPTS,
    ) -> None:
        """``watch``: attach to the watch-only socket ``socket_path``, offering no action.
        ``first_attempts``: how many times to try a daemon not reached yet before giving up."""
        super().__init__()
        self.watch_only = watch
        self.socket_path = str(socket_path)
        self.operator = operator
        self.setup_defaults: dict[str, Any] = dict(setup_defaults or {})
        self.client_factory = client_factory or self._connect
        self.client: DaemonClient | None = None
        self.snapshot: dict[str, Any] | None = None
        self.link = LinkStatus(False, NOT_CONNECTED)
        self._latest_seq = -1
        self._incoming: dict[str, Any] | None = None
        self.first_attempts = first_attempts
        #: Why the console gave up before it ever reached a daemon (None: it did not).
        self.unreachable: str | None = None

    def compose(self) -> ComposeResult:
        yield Static(
            f"Connecting to the daemon at {self.socket_path}…", id="connecting", markup=False
        )

    def on_mount(self) -> None:
        self.follow_daemon()

    # -- the daemon link ---------------------------------------------------------------------
    async def _connect(self, socket_path: str) -> DaemonClient:
        return await DaemonClient.connect(socket_path, client="console", operator=self.operator)

    @work(exclusive=True, group="daemon-link")
    async def follow_daemon(self) -> None:
        """Stay attached to the daemon: subscribe, relay snapshots, reconnect with backoff."""
        delay_s, failed, attached = RETRY_FIRST_S, 0, False
        while True:
            try:
                client = await self.client_factory(self.socket_path)
            except (OSError, ConnectionLost, DaemonError) as error:
                failed += 1
                refused = isinstance(error, PermissionError)  # trying again will not help
                if not attached and (failed >= self.first_attempts or refused):
                    self.unreachable = no_daemon_words(self.socket_path, error, failed)
                    self.exit(1)
                    return
                text = f"{NOT_CONNECTED} ({error})"
                if not attached:
                    text = f"No daemon answers yet: attempt {failed} of {self.first_attempts} "
                    text += f"({_why_unreachable(error, self.socket_path)}); retrying…"
                self.post_message(LinkChanged(LinkStatus(False, text)))
                await asyncio.sleep(delay_s)
                delay_s = min(2 * delay_s, RETRY_LONGEST_S)
                continue
            delay_s, failed, attached = RETRY_FIRST_S, 0, True
            await self._relay(client)
            self.post_message(LinkChanged(LinkStatus(False, NOT_CONNECTED)))

    async def _relay(self, client: DaemonClient) -> None:
        """Pass the daemon's snapshots on until the connection ends."""
        self.client = client
        try:
            snapshot = await client.subscribe()
            connected = LinkStatus(True, "Connected to the daemon", watching=self.watch_only)
            self.post_message(LinkChanged(connected))
            self._pass_on(snapshot)
            async for note in client.notifications():
                if note.method == NOTIFY_SNAPSHOT and isinstance(note.params, dict):
                    self._pass_on(note.params)
        except (ConnectionLost, DaemonError):
            pass
        finally:
            self.client = None
            await client.close()

    def _pass_on(self, snapshot: dict[str, Any]) -> None:
        """Post the snapshot; while the screen is busy, only the newest one will be drawn."""
        self._incoming = snapshot
        self.post_message(SnapshotArrived(snapshot))

    async def call_daemon(self, method: str, **params: Any) -> Any:
        """Send one request to the daemon and return its result.

        Raises ``DaemonError`` when the daemon refuses (its message names the field; the
        watch-only socket refuses every action by name) and ``ConnectionLost`` when the console
        is not attached.
        """
        if self.client is None or not self.client.connected:
            raise ConnectionLost("not connected to the daemon; retrying in the background")
        if method == Method.SESSION_START:
            await self._act_as((params.get("metadata") or {}).get("operator"))
        return await self.client.call(method, **params)

    async def _act_as(self, operator: object) -> None:
        """Make the operator named in the setup form the actor of this console's requests from
        now on (the audit's ``actor``; the Unix account is recorded beside it), on this
        connection and on any after a reconnection."""
        if not isinstance(operator, str) or not operator.strip() or operator == self.operator:
            return
        assert self.client is not None
        await self.client.call(Method.HELLO, client="console", operator=operator)
        self.operator = operator

    # -- passing the state down --------------------------------------------------------------
    @on(SnapshotArrived)
    def snapshot_arrived(self, message: SnapshotArrived) -> None:
        if message.snapshot is not self._incoming:
            return  # a newer snapshot is already on its way: draw that one
        seq = int(message.snapshot.get("seq", 0))
        if seq < self._latest_seq:
            return  # overtaken by a newer snapshot on the same connection
        self._latest_seq = seq
        self.snapshot = message.snapshot
        self._remember_details(message.snapshot)
        self._route()

    @on(LinkChanged)
    def link_changed(self, message: LinkChanged) -> None:
        self.link = message.status
        if not self.link.connected:
            self._latest_seq = -1  # a restarted daemon counts its snapshots afresh
        self._route()

    @on(SetupFinished)
    def setup_finished(self) -> None:
        self._route()

    def _remember_details(self, snapshot: dict[str, Any]) -> None:
        """Keep the last session's details and air data to offer them for the next session."""
        session = snapshot.get("session")
        if session:
            self.setup_defaults.update(session.get("metadata") or {})
        environment = snapshot.get("environment")
        if environment:
            self.setup_defaults.update(environment)

    @property
    def main_screen(self) -> ConsoleScreen | None:
        """Return the main screen under any open dialog, or None before the first snapshot."""
        for screen in reversed(self.screen_stack):
            if isinstance(screen, ConsoleScreen):
                return screen
        return None

    def _route(self) -> None:
        """Show the screen the latest snapshot belongs to, and pass the snapshot down."""
        if not self.screen_stack:
            return  # the console is closing: a message still queued has no screen to reach
        current = self.main_screen
        if self.snapshot is None:
            if current is not None:
                current.show(self.snapshot, self.link)
            else:
                self._say_waiting()
            return
        wanted = snapshot_view.screen_for(self.snapshot)
        if current is not None and current.kind != wanted and not current.is_mounted:
            # A screen still being put up is not taken down: its widgets would mount without
            # their parts (seen on a loaded machine). The latest snapshot is routed once it is up.
            self.call_after_refresh(self._route)
            return
        if current is not None and (current.kind == wanted or current.holds_screen()):
            current.show(self.snapshot, self.link)
            return
        while isinstance(self.screen, ModalScreen):
            self.pop_screen()
        screen = self._new_screen(wanted)
        screen.show(self.snapshot, self.link)
        if current is None:
            self.push_screen(screen)
        else:
            self.switch_screen(screen)
        self.call_after_refresh(_settle_heap)

    def _say_waiting(self) -> None:
        """Say, before the first snapshot, where the console is looking for the daemon."""
        where = f"the daemon's socket: {self.socket_path}"
        line = f"!! {self.link.text}" if not self.link.connected else self.link.text
        self.query_one("#connecting", Static).update(f"{line}\n{where}\nCtrl+Q quits.")

    def _new_screen(self, kind: str) -> ConsoleScreen:
        if kind == "measure":
            return MeasureScreen(self.call_daemon)
        if kind == "summary":
            return SummaryScreen(self.call_daemon)
        return SetupScreen(self.call_daemon, self.setup_defaults)


def _why_unreachable(error: BaseException, socket_path: str | Path) -> str:
    """Return why a connection to the daemon's socket at ``socket_path`` failed, in words."""
    if isinstance(error, FileNotFoundError):
        return "no socket there"
    if isinstance(error, ConnectionRefusedError):
        if not _is_socket(socket_path):  # Linux refuses a connection to a regular file too
            return "the file there is not a socket"
        return "a socket file is there but nothing listens on it"
    return str(error) or type(error).__name__


def _is_socket(path: str | Path) -> bool:
    """Return True when ``path`` is a socket (or cannot be looked at: then say no more)."""
    try:
        return stat.S_ISSOCK(os.stat(path).st_mode)
    except OSError:
        return True


def _settle_heap() -> None:
    """Collect once, then freeze what is left (the new screen's widgets, the app): Python's
    collector then no longer walks them in its full passes, which took 47-74 ms while readings
    streamed (a frame missed, issue 17 target 1). The screen left behind is collected first,
    so a long-running console keeps no old screens."""
    gc.unfreeze()
    gc.collect()
    gc.freeze()


def no_daemon_words(socket_path: str, error: BaseException, attempts: int) -> str:
    """Return what the console says when it never reached a daemon at ``socket_path``: that
    none listens there, why the last attempt failed, and how to start one; or, when this user
    may not use the socket (a PermissionError: not retried), why and what to do."""
    if isinstance(error, PermissionError):
        return (
            f"this account may not use the daemon's socket at {socket_path} ({error}). Run the "
            "console as the account the daemon runs as, or as a member of the socket group it "
            "was started with (`chargebook serve --socket-group NAME`); or give the console the "
            "--socket of a daemon of your own."
        )
    return (
        f"no chargebook daemon listens at {socket_path} ({_why_unreachable(error, socket_path)}; "
        f"tried {attempts} times). Start one with `chargebook serve --port DEVICE` (and --socket "
        "PATH when its socket is not the default), or `chargebook demo` for the simulated "
        "bench; or give the console the --socket of a running daemon."
    )


def closing_words(
    snapshot: Mapping[str, Any] | None,
    socket_path: str,
    *,
    demo_database: str | Path | None = None,
) -> str:
    """Return what the console says as it closes: what goes on, where, and how to come back.

    With ``demo_database`` the daemon stops with the console (the demo), so the words say where
    the session is kept and how to resume it instead.
    """
    session = (snapshot or {}).get("session")
    is_open = session is not None and snapshot_view.screen_for(snapshot or {}) == "measure"
    if demo_database is not None:
        if not is_open:
            return f"Demo closed. Its sessions are kept in {demo_database}."
        return (
            f"Demo closed with session {session['id']} still open; it is kept in "
            f"{demo_database}. `chargebook demo` resumes it; "
            f"`chargebook sessions --db {demo_database}` lists it."
        )
    if snapshot is None and demo_database is None:  # no daemon ever answered this console
        return f"Console closed before a daemon at {socket_path} answered; nothing was asked of it."
    again = f"Re-attach with: chargebook console --socket {socket_path}"
    if is_open:
        return (
            f"Console closed. Session {session['id']} stays open in the daemon at "
            f"{socket_path}: the measurement goes on. {again}"
        )
    return f"Console closed. The daemon at {socket_path} goes on running. {again}"


def run_console(
    socket_path: str | Path,
    *,
    watch: bool = False,
    operator: str | None = None,
    setup_defaults: Mapping[str, Any] | None = None,
    demo_database: str | Path | None = None,
) -> int:
    """Run the console attached to the daemon at ``socket_path``; return the exit status (0).

    ``setup_defaults`` pre-fills the session form (keys of ``session_meta`` plus
    ``temperature_C``, ``pressure_entered`` and ``pressure_unit``). Closing the console leaves
    the daemon and any measurement running, and says so (:func:`closing_words`).
    """
    app = ConsoleApp(socket_path, operator=operator, setup_defaults=setup_defaults, watch=watch)
    result = app.run()
    if app.unreachable is not None:
        print(f"chargebook console: {app.unreachable}", file=sys.stderr)
        return 1
    print(closing_words(app.snapshot, str(socket_path), demo_database=demo_database))
    return 0 if result is None else int(result)
