"""A bare Textual app that shows one console screen fed a fixed snapshot dict.

For widget and screenshot tests only: the screen is the real one, with the console's style
sheet; it is given a snapshot from ``tests/tui/fixtures`` instead of a daemon, and any request
it sends fails as it would with no daemon attached.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from pathlib import Path
from typing import Any

from chargebook.acquire.client import ConnectionLost
from chargebook.tui import app as console_app
from chargebook.tui.messages import LinkStatus
from chargebook.tui.screens.base import ConsoleScreen, Sender
from textual.app import App
from textual.widgets import Input

FIXTURES = Path(__file__).parent / "fixtures"
CONSOLE_CSS = Path(console_app.__file__).parent / "console.tcss"
CONNECTED = LinkStatus(True, "Connected to the daemon")


def load_snapshot(name: str) -> dict[str, Any]:
    """Return the fixed snapshot ``tests/tui/fixtures/<name>.json``."""
    return json.loads((FIXTURES / f"{name}.json").read_text())


class ScreenHarness(App):
    """Shows ``make_screen(send)`` fed ``snapshot``; ``sent`` records every request tried."""

    CSS_PATH = str(CONSOLE_CSS)
    ENABLE_COMMAND_PALETTE = False
    BINDINGS = console_app.ConsoleApp.BINDINGS

    def __init__(
        self,
        make_screen: Callable[[Sender], ConsoleScreen],
        snapshot: dict[str, Any] | None,
        link: LinkStatus = CONNECTED,
    ) -> None:
        super().__init__()
        self.make_screen = make_screen
        self.initial_snapshot = snapshot
        self.initial_link = link
        self.sent: list[tuple[str, dict[str, Any]]] = []

    async def no_daemon(self, method: str, **params: Any) -> Any:
        """Record the request, then fail as the console does with no daemon attached."""
        self.sent.append((method, params))
        raise ConnectionLost("no daemon in this test")

    def on_mount(self) -> None:
        screen = self.make_screen(self.no_daemon)
        screen.show(self.initial_snapshot, self.initial_link)
        self.push_screen(screen)

    @property
    def console_screen(self) -> ConsoleScreen:
        """Return the screen under test (under any dialog it opened)."""
        return next(s for s in reversed(self.screen_stack) if isinstance(s, ConsoleScreen))


def then_steady(*keys: str, action: Callable[[App], None] | None = None):
    """Return a Pilot routine: press ``keys``, run ``action(app)``, then stop cursors blinking.

    A blinking text cursor would make a screenshot depend on the instant it is taken.
    """

    async def routine(pilot) -> None:
        await pilot.press(*keys)
        await pilot.pause()
        if action is not None:
            action(pilot.app)
            await pilot.pause()
        for entry in pilot.app.screen.query(Input):
            entry.cursor_blink = False
        await pilot.pause()

    return routine
