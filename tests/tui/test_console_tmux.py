"""`chargebook console --socket PATH` in a real terminal: tmux at 80 × 24, keys sent with
send-keys, the screen read back with capture-pane, against the real daemon and the simulated
electrometer. CI installs tmux (.ci/run).

The session is started by another client of the daemon (as a colleague at a second desk
would); the console attaches to it, is closed mid-set without stopping the measurement, is
opened again, and takes the plan to the summary by keys alone.
"""

from __future__ import annotations

import asyncio
import shutil
import subprocess
from pathlib import Path

import pytest
from chargebook.acquire.protocol import Method
from chargebook.tui import text
from e2e_support import chargebook_command

pytestmark = pytest.mark.e2e

#: Longest wait for the screen to show something, in wall seconds (a deadline, not a check).
DEADLINE_S = 60.0


EXIT_WORDS = "console exit status: "


class Terminal:
    """One tmux server of our own (its socket under tmp_path) running the console at 80 × 24."""

    def __init__(self, tmp_path: Path) -> None:
        tmux = shutil.which("tmux")
        if tmux is None:
            pytest.fail("tmux is not installed: apt-get install -y tmux (CI installs it)")
        self.tmux = [tmux, "-S", str(tmp_path / "tmux.sock")]
        self.name = "console"
        self.exit_status = ""  # the console's exit status, once it has exited (last_words)

    def run(self, *args: str) -> str:
        done = subprocess.run([*self.tmux, *args], capture_output=True, text=True, timeout=30)
        if done.returncode != 0:
            raise RuntimeError(f"tmux {' '.join(args)}: {done.stderr.strip()}")
        return done.stdout

    def open_console(self, socket: Path) -> None:
        """Start `chargebook console --socket SOCKET` in a fresh 80 × 24 window."""
        console = " ".join(chargebook_command("console", "--socket", str(socket)))
        # tmux 3.3a sometimes never fills #{pane_dead_status} (seen about one time in three
        # on a loaded machine), so the shell that runs the console prints its exit status.
        command = f"{console}; printf '\\n{EXIT_WORDS}%s\\n' $?"
        # The window is made with a shell and kept when its program exits, before the console
        # is started in it: a console that stops at once leaves its last words to read, not a
        # tmux server that exited under the test ("server exited unexpectedly").
        self.run("new-session", "-d", "-s", self.name, "-x", "80", "-y", "24")
        self.run("set-option", "-t", self.name, "remain-on-exit", "on")
        self.run("respawn-pane", "-k", "-t", self.name, command)

    def is_open(self) -> bool:
        """Return True while the console's window is still there."""
        done = subprocess.run([*self.tmux, "has-session", "-t", self.name], capture_output=True)
        return done.returncode == 0

    def screen(self) -> str:
        """Return the characters on the screen (capture-pane)."""
        return self.run("capture-pane", "-p", "-t", self.name)

    def keys(self, *keys: str) -> None:
        self.run("send-keys", "-t", self.name, *keys)

    async def shows(self, text: str) -> str:
        """Wait until the screen shows ``text``; return the screen, or fail showing it."""
        screen = ""
        for _ in range(int(DEADLINE_S / 0.1)):
            screen = self.screen() if self.is_open() else ""
            if text in screen:
                return screen
            await asyncio.sleep(0.1)
        pytest.fail(f"the console never showed {text!r}; last screen:\n{screen}")

    async def last_words(self) -> str:
        """Wait until the console has exited; return what it printed last, then close it."""
        for _ in range(int(DEADLINE_S / 0.1)):
            if self.run("display-message", "-p", "-t", self.name, "#{pane_dead}").strip() == "1":
                # -J unwraps long lines; -S - includes what scrolled off the top
                screen = self.run("capture-pane", "-p", "-J", "-S", "-", "-t", self.name)
                words, _, status = screen.rpartition(EXIT_WORDS)  # then tmux's "Pane is dead"
                self.exit_status, screen = (status.split() or [""])[0], words
                self.run("kill-session", "-t", self.name)
                return screen
            await asyncio.sleep(0.1)
        pytest.fail(f"the console did not close; last screen:\n{self.screen()}")

    def kill(self) -> None:
        subprocess.run([*self.tmux, "kill-server"], capture_output=True)


@pytest.fixture
def terminal(tmp_path: Path):
    terminal = Terminal(tmp_path)
    yield terminal
    terminal.kill()


#: The key for each action, in the order a plain run takes them.
KEYS = ((Method.STEP_MANUAL_DONE, "d"), (Method.SET_ACCEPT, "k"), (Method.STEP_ARM, "a"))
#: States the daemon leaves by itself as readings come: the console may draw the next snapshot
#: instead (under load it skips to the newest), so the test does not wait to see them.
PASSING_STATES = ("settling", "collecting")


async def next_key(terminal: Terminal, client, snapshot: dict) -> dict:
    """Press the key of the next move the daemon allows, once the console shows the same state
    (it hears of each change a moment after this test's own client), then return the next
    snapshot."""
    await terminal.shows(f"Step {snapshot['step_index'] + 1} of")
    if snapshot["state"] not in PASSING_STATES:
        await terminal.shows(text.state(snapshot["state"]))
    for method, key in KEYS:
        if method in snapshot["allowed"]:
            terminal.keys(key)
            break
    seq = snapshot["seq"]
    return await client.wait_for_snapshot(lambda s: s["seq"] > seq, 60)


@pytest.mark.slow
async def test_the_console_in_a_terminal_attaches_quits_without_stopping_and_finishes(
    terminal, simulator, daemon, metadata
):
    client = await daemon.connect(operator="second desk")
    try:
        await client.subscribe()
        await client.call(Method.SESSION_START, metadata=metadata)
        with simulator.bench() as bench:
            air = bench.environment()
        await client.call(
            Method.ENVIRONMENT_SET, temperature_C=air["temperature_C"], pressure=air["pressure_kPa"]
        )
        terminal.open_console(daemon.socket)
        await terminal.shows("Do now:")
        screen = await terminal.shows("a Arm c Capture")  # the key help, always on screen
        assert screen.splitlines()[0].startswith(" Session 1 · DEMO-LA1 6 MV · waiting for you")
        snapshot = client.latest_snapshot
        while snapshot["step_index"] < 1:  # the leakage step, by keys
            snapshot = await next_key(terminal, client, snapshot)
        terminal.keys("a")  # arm the routine set ...
        snapshot = await client.wait_for_snapshot(lambda s: s["state"] == "collecting", 60)
        terminal.keys("C-q")  # ... and close the console in the middle of it
        words = " ".join((await terminal.last_words()).split())
        assert f"Session 1 stays open in the daemon at {daemon.socket}" in words
        assert f"Re-attach with: chargebook console --socket {daemon.socket}" in words
        still = await client.status()
        assert still["state"] in ("collecting", "reviewing")  # the measurement goes on
        terminal.open_console(daemon.socket)
        await terminal.shows("Routine polarity")
        snapshot = client.latest_snapshot
        while snapshot["state"] != "finished":
            snapshot = await next_key(terminal, client, snapshot)
        await terminal.shows("Session 1 finished")
        screen = await terminal.shows("n New session")
    finally:
        await client.close()
    results = snapshot["results"]
    words = " ".join(screen.replace("\u00a0", " ").split())  # as read, spacing aside
    assert f"Dose per MU {results['dose_per_MU_cGy']:.4f} cGy/MU" in words
    assert f"Corrected M_Q {results['M_corrected_nC']:.4f} nC" in words
    assert "Caution: chargebook supports, and never replaces" in screen


@pytest.mark.slow  # the console tries for about 9 s, as for a daemon still starting
async def test_the_console_on_a_socket_where_no_daemon_listens_says_so_and_exits_non_zero(
    terminal, tmp_path: Path
):
    missing = tmp_path / "nowhere" / "daemon.sock"
    terminal.open_console(missing)
    screen = await terminal.shows("No daemon answers yet: attempt ")  # 1, or later under load
    assert "of 8 (no socket there)" in " ".join(screen.split())
    words = " ".join((await terminal.last_words()).split())
    assert f"chargebook console: no chargebook daemon listens at {missing}" in words
    assert "(no socket there; tried 8 times)" in words
    assert "Start one with `chargebook serve --port DEVICE`" in words
    assert terminal.exit_status.strip() == "1"
