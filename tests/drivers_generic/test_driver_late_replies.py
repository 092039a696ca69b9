"""The driver against a misbehaving instrument of our own on a real pseudo-terminal.

One late answer used to knock command/reply pairing off by one until a reconnect (the answer
to a resent query was taken as the answer to the next command, and so on), and an instrument
that answers every query slowly was never reported. The instrument here speaks the query-plain
dialect (``drivers_generic/profiles/query-plain.toml``: "Q?" is answered "Q +n.0000 nC A", every
other command "OK"; the profile allows 1.0 s per answer) from a thread on the pty's master side,
and waits before the answers we choose.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import sys
import threading
import time
import tty
from collections.abc import Callable, Iterator
from dataclasses import replace
from pathlib import Path

import pytest
from chargebook.drivers_generic import build_electrometer
from chargebook.drivers_generic.driver import SLOW_WINDOW
from chargebook.drivers_generic.profile import load_profile

sys.path.insert(0, str(Path(__file__).parents[1] / "e2e"))
from e2e_support import QUICK_PLAN, DaemonProcess


class SlowInstrument(threading.Thread):
    """Answers query-plain commands on a pty; ``delay_s(n)`` is the wait before the n-th answer
    (1-based). Each "Q?" reports a charge one higher than the last, so answers can be told
    apart."""

    def __init__(self, master: int, delay_s: Callable[[int], float]) -> None:
        super().__init__(daemon=True)
        self.master, self.delay_s = master, delay_s
        self.answered = 0
        self.charges = 0

    def run(self) -> None:
        buffer = b""
        with contextlib.suppress(OSError):
            while True:
                buffer += os.read(self.master, 1024)
                while b"\r\n" in buffer:
                    line, buffer = buffer.split(b"\r\n", 1)
                    self.answered += 1
                    time.sleep(self.delay_s(self.answered))
                    if line == b"Q?":
                        self.charges += 1
                        os.write(self.master, f"Q +{self.charges}.0000 nC A\r\n".encode())
                    elif line == b"ID?":
                        os.write(self.master, b"test bench;QUERY-PLAIN;SIM-EM-0002;0.1.0\r\n")
                    else:
                        os.write(self.master, b"OK\r\n")


@pytest.fixture
def instrument() -> Iterator[Callable[[Callable[[int], float]], object]]:
    """Start a SlowInstrument on a fresh pty; return a driver (query-plain, its answer time
    ``timeout_s`` if given) opened on it."""
    opened = []

    def start(delay_s: Callable[[int], float], timeout_s: float | None = None):
        master, slave = os.openpty()
        tty.setraw(slave)
        answering = SlowInstrument(master, delay_s)
        answering.start()
        profile = load_profile("query-plain")
        if timeout_s is not None:
            profile = replace(profile, timing=replace(profile.timing, timeout_s=timeout_s))
        driver = build_electrometer(profile, port=os.ttyname(slave))
        driver.open()
        opened.append((driver, master, slave, answering))
        return driver

    yield start
    for driver, master, slave, answering in opened:
        # The instrument's thread must end before its pty's numbers are freed: one still
        # waiting to answer a resent query wrote into the next test's pty, which the system
        # had given the same file descriptor (a run beside other tests showed "Q +6" there).
        driver.close()
        with contextlib.suppress(OSError):
            os.close(slave)  # the last slave closed: the thread's read of the master fails
        answering.join(timeout=10)
        assert not answering.is_alive(), "the simulated instrument's thread did not end"
        with contextlib.suppress(OSError):
            os.close(master)


def test_one_late_answer_does_not_put_the_following_commands_off_by_one(instrument):
    driver = instrument(lambda n: 1.3 if n == 2 else 0.0)  # the 2nd answer comes after 1.3 s
    assert driver.read_charge().charge_nC == 1.0
    # the 2nd "Q?" is resent after 1.0 s; its late answer (2) answers the same question
    assert driver.read_charge().charge_nC == 2.0
    # the resent query's own answer (3) is still waiting: it must not be taken for QZ's "OK"
    driver.zero()
    assert driver.read_charge().charge_nC == 4.0
    driver.start_integration()
    assert driver.read_charge().charge_nC == 5.0
    assert driver.late_replies == 1
    assert "1 late answer(s)" in driver.reply_note


def test_a_uniformly_slow_instrument_is_reported(instrument):
    # Every answer after 1.25 s of 2.0 s allowed: slow (over half the allowance), and late only
    # if this thread wakes 0.75 s late.
    driver = instrument(lambda n: 1.25, timeout_s=2.0)
    for expected in (1.0, 2.0, 3.0):
        assert driver.read_charge().charge_nC == expected
    assert driver.reply_note is not None
    assert "answers are slow: 3 of the last 3 took over 1 s" in driver.reply_note
    assert driver.late_replies == 0


def test_an_instrument_answering_in_good_time_has_no_note(instrument):
    driver = instrument(lambda n: 0.0)
    driver.zero()
    assert driver.read_charge().charge_nC == 1.0
    assert driver.reply_note is None


def test_a_slow_answer_is_reported_until_it_leaves_the_latest_answers(instrument):
    # Only the first answer is slow: 1.25 s of the 2.0 s allowed (0.75 s short of late).
    driver = instrument(lambda n: 1.25 if n == 1 else 0.0, timeout_s=2.0)
    assert driver.read_charge().charge_nC == 1.0
    assert "answers are slow: 1 of the last 1 took over 1 s" in driver.reply_note
    for expected in range(2, SLOW_WINDOW + 1):  # the window fills with answers in good time
        assert driver.read_charge().charge_nC == expected
    assert f"answers are slow: 1 of the last {SLOW_WINDOW} took over" in driver.reply_note
    assert driver.read_charge().charge_nC == SLOW_WINDOW + 1  # the slow one leaves the window
    assert driver.reply_note is None


@pytest.mark.e2e
async def test_the_daemon_shows_slow_answers_as_the_instruments_message(tmp_path):
    master, slave = os.openpty()
    tty.setraw(slave)
    SlowInstrument(master, lambda n: 0.6).start()  # ID? answered after 0.6 s of the 1.0 s
    args = ["serve", "--profile", "query-plain", "--port", os.ttyname(slave), "--plan", QUICK_PLAN]
    args += ["--db", str(tmp_path / "station.sqlite"), "--socket", str(tmp_path / "run" / "d.s")]
    daemon = DaemonProcess(args, tmp_path / "run" / "d.s", tmp_path / "station.sqlite",
                           tmp_path / "daemon.log").start()  # fmt: skip
    try:
        client = await daemon.connect()
        for _ in range(100):
            instrument = (await client.status())["instrument"]
            if "slow" in (instrument["message"] or ""):
                break
            await asyncio.sleep(0.1)
        await client.close()
    finally:
        daemon.stop()
        for fd in (master, slave):
            with contextlib.suppress(OSError):
                os.close(fd)
    assert instrument["connected"] is True
    assert "answers are slow: 1 of the last 1 took over 0.5 s" in instrument["message"]
