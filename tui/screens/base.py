"""What every main screen of the console shares: the status line and how it is fed."""

from __future__ import annotations

from collections.abc import Awaitable, Callable
from typing import Any

from chargebook.tui.messages import LinkStatus
from chargebook.tui.widgets.held_render import HeldRender
from chargebook.tui.widgets.status_line import StatusLine
from textual.css.query import NoMatches
from textual.screen import Screen

#: Sends one request to the daemon and returns its result (``ConsoleApp.call_daemon``).
Sender = Callable[..., Awaitable[Any]]


class ConsoleScreen(HeldRender, Screen):
    """A main screen: shown from the latest snapshot, never holding measurement state.

    The app calls :meth:`show` after every snapshot and every change of the daemon link; a
    subclass draws the snapshot in :meth:`render_snapshot`.
    """

    #: Which snapshots this screen is for ("setup", "measure" or "summary").
    kind: str = ""

    def __init__(self, send: Sender) -> None:
        super().__init__()
        self.send = send
        self.snapshot: dict[str, Any] | None = None
        self.link = LinkStatus(False, "")
        self._shown_allowed: list[str] | None = None
        self._composed = False
        self._drawn_parts: dict[str, object] = {}  # snapshot key -> the object drawn from it

    @property
    def status_line(self) -> StatusLine:
        """Return the line that says whether the daemon and electrometer are there."""
        return self.query_one(StatusLine)

    @property
    def watching(self) -> bool:
        """True when the console only watches (the watch-only socket): no action is offered."""
        return self.link.watching

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """Hide every action while watching but moving between tabs; else :meth:`offers`."""
        if self.watching and action != "show_tab":
            return False
        return self.offers(action, parameters)

    def offers(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """Return whether ``action`` is offered now (True), shown disabled (None) or hidden."""
        return True

    def holds_screen(self) -> bool:
        """Return True while this screen must stay although the snapshot belongs elsewhere."""
        return False

    def show(self, snapshot: dict[str, Any] | None, link: LinkStatus) -> None:
        """Show the latest snapshot and link status (called by the app, downward)."""
        self.snapshot, self.link = snapshot, link
        if not self._composed:
            return
        try:
            status_line = self.status_line
        except NoMatches:  # being taken down (switched away from): nothing left to draw on
            return
        status_line.link = link
        status_line.snapshot = snapshot
        if snapshot is not None:
            self.render_snapshot(snapshot)
        allowed = self.allowed()
        if allowed != self._shown_allowed:
            self._shown_allowed = allowed
            self.refresh_bindings()

    def on_mount(self) -> None:
        self._composed = True
        self.show(self.snapshot, self.link)

    def _part_is_new(self, key: str, snapshot: dict[str, Any]) -> bool:
        """Return whether ``snapshot[key]`` is another object than the one last drawn: the
        client keeps a part the daemon's delta did not change as the very same object."""
        part = snapshot.get(key)
        if key in self._drawn_parts and part is self._drawn_parts[key]:
            return False
        self._drawn_parts[key] = part
        return True

    def render_snapshot(self, snapshot: dict[str, Any]) -> None:
        """Draw ``snapshot``; each screen shows its own part of it."""

    def allowed(self) -> list[str]:
        """Return the actions the daemon allows now (none while not connected)."""
        if not self.link.connected or self.snapshot is None or self.link.watching:
            return []
        return list(self.snapshot.get("allowed") or [])
