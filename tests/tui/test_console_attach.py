"""The console reaching a daemon: a bounded number of tries for one it never reached, for ever
for one it was attached to.

The console is the real ``ConsoleApp`` under Textual's Pilot; the sockets are real Unix sockets
(none at the path, a socket file nobody listens on, the in-process daemon's). The words and the
exit status of the real ``chargebook console`` process in a terminal are in
``test_console_tmux.py``.
"""

from __future__ import annotations

import os
import socket
from collections.abc import AsyncIterator
from pathlib import Path

import pytest
from chargebook.acquire.client import DaemonClient
from chargebook.tui.app import ConsoleApp, closing_words
from console_driver import DEADLINE_S, STEP_S, until
from screen_text import screen_text

from tests.acquire.in_process_daemon import InProcessDaemon, session_daemon

SIZE = (80, 24)


async def gives_up(app: ConsoleApp) -> tuple[list[str], str]:
    """Run ``app`` until it gives up; return the screens it showed on the way and its words."""
    shown: list[str] = []
    async with app.run_test(size=SIZE) as pilot:
        for _ in range(int(DEADLINE_S / STEP_S)):
            if app.unreachable is not None:
                break
            text = screen_text(app)
            if not shown or shown[-1] != text:
                shown.append(text)
            await pilot.pause(STEP_S)
    assert app.unreachable is not None, f"the console never gave up; it showed {shown}"
    assert app.return_value == 1
    return shown, app.unreachable


async def test_a_socket_path_with_nothing_there_is_tried_a_counted_few_times_then_refused(
    tmp_path: Path,
) -> None:
    path = tmp_path / "no-daemon" / "daemon.sock"
    shown, words = await gives_up(ConsoleApp(path, first_attempts=3))
    counted = [s for s in shown if "No daemon answers yet: attempt " in s]
    assert counted and all("of 3 (no socket there); retrying" in s for s in counted)
    assert words.startswith(f"no chargebook daemon listens at {path} (no socket there; tried 3")
    assert "Start one with `chargebook serve --port DEVICE`" in words


async def test_a_socket_file_nobody_listens_on_is_named_as_such(tmp_path: Path) -> None:
    path = tmp_path / "daemon.sock"
    stale = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    stale.bind(str(path))  # a socket file left by a daemon that stopped: bound, not listening
    try:
        _shown, words = await gives_up(ConsoleApp(path, first_attempts=2))
    finally:
        stale.close()
    assert "a socket file is there but nothing listens on it; tried 2 times" in words


async def test_a_plain_file_at_the_socket_path_is_not_called_a_socket(tmp_path: Path) -> None:
    path = tmp_path / "daemon.sock"
    path.write_text("not a socket\n", encoding="utf-8")  # Linux refuses it as a stale socket
    shown, words = await gives_up(ConsoleApp(path, first_attempts=2))
    assert "of 2 (the file there is not a socket); retrying" in " ".join(" ".join(shown).split())
    assert "the file there is not a socket; tried 2 times" in words
    assert "a socket file is there" not in words


async def test_a_socket_this_account_may_not_use_is_refused_at_once_in_words(
    tmp_path: Path,
) -> None:
    # Another account's private directory (uid 65534, "nobody" on most systems, invented here):
    # no number of tries will let this account in, so the console does not retry.
    directory = tmp_path / "theirs"
    directory.mkdir(mode=0o700)
    os.chown(directory, 65534, 65534)
    path = directory / "daemon.sock"
    shown, words = await gives_up(ConsoleApp(path, first_attempts=5))
    assert not any("attempt 2 of 5" in text for text in shown)
    assert words.startswith(f"this account may not use the daemon's socket at {path} (")
    assert f"{directory} belongs to another user (uid 65534)" in words
    assert "--socket-group NAME" in words and "no chargebook daemon listens" not in words


async def test_quitting_before_any_daemon_answered_does_not_say_one_goes_on_running(
    tmp_path: Path,
) -> None:
    path = tmp_path / "no-daemon" / "daemon.sock"
    app = ConsoleApp(path)
    async with app.run_test(size=SIZE) as pilot:
        await until(pilot, lambda: "No daemon answers yet" in screen_text(app), "a retry")
        await pilot.press("ctrl+q")
    words = closing_words(app.snapshot, str(path))
    assert app.unreachable is None and "goes on running" not in words
    assert words == f"Console closed before a daemon at {path} answered; nothing was asked of it."


async def test_a_message_still_queued_as_the_console_closes_is_dropped(tmp_path: Path) -> None:
    # Seen once in a loaded suite run: the setup form's "finished" message reached the app
    # after its last screen was gone, and routing it raised ScreenStackError at close.
    app = ConsoleApp(tmp_path / "no-daemon" / "daemon.sock")
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("ctrl+q")
    assert not app.screen_stack
    app.setup_finished()  # what the queued message does: nothing, now


@pytest.fixture
async def daemon(tmp_path: Path) -> AsyncIterator[InProcessDaemon]:
    async with session_daemon(tmp_path) as daemon:
        yield daemon


async def test_once_attached_the_console_retries_past_the_first_attach_limit(daemon) -> None:
    calls = 0

    async def flaky(path: str) -> DaemonClient:
        """The daemon's socket, unreachable from the second try to the fifth (a restart)."""
        nonlocal calls
        calls += 1
        if 2 <= calls <= 5:
            raise ConnectionRefusedError("the daemon is restarting")
        return await DaemonClient.connect(path, client="console")

    app = ConsoleApp(daemon.socket, first_attempts=2, client_factory=flaky)
    async with app.run_test(size=SIZE) as pilot:
        await until(pilot, lambda: app.link.connected, "the daemon")
        assert app.client is not None
        await app.client.close()  # the connection drops
        await until(pilot, lambda: calls >= 6 and app.link.connected, "the daemon again")
        assert app.unreachable is None and app.is_running
