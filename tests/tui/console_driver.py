"""Drive the real console with key presses through Textual's Pilot, as an operator would.

Waits are deadlines, not timed assertions: a wait that runs out fails the test with what the
console showed, whatever the speed of the machine.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import pytest
from chargebook.tui.app import ConsoleApp
from screen_text import screen_text
from textual.pilot import Pilot

#: Longest wait for the daemon to move on, in wall seconds (a deadline against a hung test).
DEADLINE_S = 60.0
STEP_S = 0.05


async def until(pilot: Pilot, ready: Callable[[], bool], what: str) -> None:
    """Let the app run until ``ready()``; fail naming ``what`` and showing the screen if never."""
    for _ in range(int(DEADLINE_S / STEP_S)):
        if ready():
            return
        await pilot.pause(STEP_S)
    pytest.fail(f"the console never showed {what}:\n{screen_text(pilot.app)}")


def state(app: ConsoleApp) -> str:
    """Return the state in the console's latest snapshot ("" before the first)."""
    return (app.snapshot or {}).get("state", "")


def allowed(app: ConsoleApp) -> list[str]:
    """Return the actions the console's latest snapshot allows."""
    return list((app.snapshot or {}).get("allowed") or [])


def screen_kind(app: ConsoleApp) -> str:
    """Return which main screen is up: "setup", "measure", "summary" (or "" before any, and
    while the next one is still mounting: on a loaded machine a test that read it then would
    see an empty screen)."""
    screen = app.main_screen
    return screen.kind if screen is not None and screen.is_mounted else ""


#: The key an operator presses for each action, in the order of preference of a plain run.
KEYS_FOR_NEXT_MOVE: tuple[tuple[str, str], ...] = (
    ("step.manual_done", "d"),
    ("set.accept", "k"),
    ("step.arm", "a"),
)


async def press_and_wait(pilot: Pilot, app: ConsoleApp, *keys: str) -> None:
    """Press ``keys`` and wait until the daemon has sent a new snapshot."""
    seq = (app.snapshot or {}).get("seq")
    await pilot.press(*keys)
    await until(pilot, lambda: (app.snapshot or {}).get("seq") != seq, f"a change after {keys}")


async def next_move(pilot: Pilot, app: ConsoleApp) -> None:
    """Make the one move a plain run makes now (by hand, accept, arm), or wait for the daemon."""
    for method, key in KEYS_FOR_NEXT_MOVE:
        if method in allowed(app):
            await press_and_wait(pilot, app, key)
            return
    seq = (app.snapshot or {}).get("seq")
    await until(pilot, lambda: (app.snapshot or {}).get("seq") != seq, "the daemon moving on")


async def run_until(pilot: Pilot, app: ConsoleApp, done: Callable[[], bool], what: str) -> None:
    """Operate by keys, one move at a time, until ``done()`` (at most one move per snapshot)."""
    for _ in range(500):
        if done():
            return
        await next_move(pilot, app)
    pytest.fail(f"the session never reached {what}:\n{screen_text(app)}")


async def start_session(pilot: Pilot, app: ConsoleApp) -> None:
    """Wait for the setup form, start the session with Ctrl+S, and wait for the first step."""
    await until(pilot, lambda: screen_kind(app) == "setup", "the setup form")
    await pilot.press("ctrl+s")
    await until(
        pilot,
        lambda: (
            screen_kind(app) == "measure"
            and app.main_screen.is_mounted  # put up whole: a test may end the app right after
            and (app.snapshot or {}).get("environment")
        ),
        "the measure screen with the air data recorded",
    )


def current_results(app: ConsoleApp) -> dict[str, Any]:
    """Return the results in the console's latest snapshot."""
    return dict((app.snapshot or {}).get("results") or {})


async def start_and_reach_step(pilot: Pilot, app: ConsoleApp, step_index: int) -> None:
    """Start the session from the form, then operate by keys until ``step_index`` is current."""
    await start_session(pilot, app)
    await run_until(
        pilot, app, lambda: app.snapshot["step_index"] == step_index, f"step {step_index + 1}"
    )


async def daemon_record(daemon) -> dict[str, Any]:
    """Return the daemon's own state, asked over a connection of its own (not the console's)."""
    client = await daemon.connect()
    try:
        return await client.status()
    finally:
        await client.close()
