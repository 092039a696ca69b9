"""The daemon's record condition, in words: what the operator is told while raw lines wait in
memory for a record that cannot commit (the real daemon under these faults is in
``tests/faults/store_faults.py`` and ``tests/e2e/test_record_files_e2e.py``); and when the
instrument thread commits the raw lines it read, on the simulated electrometer's dialect.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from pathlib import Path

from chargebook.acquire.daemon.daemon import (
    LINES_COMMIT_S,
    MAX_HELD_LINES,
    Daemon,
    DaemonOptions,
    InstrumentLink,
)
from chargebook.acquire.engine import driver_commands
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.record.store import Store
from chargebook.drivers_generic.interface import TrafficDirection
from chargebook.drivers_generic.simulator.memory_wire import (
    InProcessElectrometer,
    in_process_electrometer,
)


def test_the_operator_is_told_how_many_lines_are_held_and_when_the_bound_nears(tmp_path: Path):
    daemon = Daemon(
        DaemonOptions("query-plain", tmp_path / "s.sqlite", tmp_path / "run" / "d.sock")
    )
    daemon.engine = Engine(Store.memory())
    daemon._lines_not_writable("the disk is full", 1_000)
    assert daemon.engine.record_fault == (
        "record not writable: the disk is full (1,000 raw lines held in memory)"
    )
    assert daemon.engine.snapshot()["allowed"] == []
    daemon._lines_not_writable("the disk is full", int(0.85 * MAX_HELD_LINES))
    assert f"at {MAX_HELD_LINES:,} the electrometer is no longer read" in (
        daemon.engine.record_fault
    )
    daemon._lines_not_writable(None, 0)
    assert daemon.engine.record_fault is None
    assert "session.start" in daemon.engine.snapshot()["allowed"]


def _pushing_electrometer(received: list[bytes]) -> InProcessElectrometer:
    """Return the simulated electrometer (push-exponent dialect, in process) whose driver
    appends each line it receives to ``received``."""

    def heard(direction: TrafficDirection, t_s: float, raw: bytes) -> None:
        if direction == TrafficDirection.RECEIVED:
            received.append(raw)

    return in_process_electrometer("push-exponent", traffic=heard)


def test_a_line_nobody_waits_for_is_not_posted_and_waits_for_the_next_commit() -> None:
    received: list[bytes] = []
    sim = _pushing_electrometer(received)
    posted: list[str] = []
    commits: list[float] = []
    link = InstrumentLink(
        sim.driver,
        lambda kind, payload: posted.append(kind),
        flush=lambda: commits.append(time.monotonic()) or True,
    )
    sim.driver.open()
    link.sample_for(1)
    link.send(driver_commands.Zero())
    link.send(driver_commands.StartIntegration())
    link._serve_once()  # the thread's turn: it reads for reading 1, re-armed
    link.sample_for(2)  # the loop took reading 1 and armed reading 2: not yet in the thread's turn
    posted.clear()
    commits.clear()
    seen = len(received)
    for _ in range(200):  # the simulator pushes a line every 0.2 s or so
        link._read_samples(True)
        if len(received) > seen:
            break
    assert len(received) > seen  # a line was read, for reading 1
    # the loop would drop its sample (another reading): not posted, nor committed for it
    assert posted == [] and commits == []
    link._release()  # committed with whatever is posted next ...
    link._end_turn()  # ... not again at the end of the turn, while samples are read ...
    assert len(commits) == 1
    time.sleep(LINES_COMMIT_S)
    link._end_turn()  # ... and at the latest LINES_COMMIT_S later
    assert len(commits) == 2
    sim.driver.close()


def _until(condition: Callable[[], bool], limit_s: float = 20.0) -> bool:
    """Wait until ``condition()`` holds (True), or give up after ``limit_s`` (False)."""
    end_s = time.monotonic() + limit_s
    while not condition():
        if time.monotonic() > end_s:
            return False
        time.sleep(0.01)
    return True


def test_the_port_is_read_on_while_a_commit_waits_and_nothing_is_posted_before_it() -> None:
    received: list[bytes] = []
    sim = _pushing_electrometer(received)
    posted: list[str] = []
    hold, holding, release = threading.Event(), threading.Event(), threading.Event()
    waiting: list[int] = []  # lines received when the held commit began

    def flush() -> bool:  # a commit whose fsync takes as long as the test wants
        if hold.is_set() and not holding.is_set():
            waiting.append(len(received))
            holding.set()
            release.wait(60)
        return True

    link = InstrumentLink(sim.driver, lambda kind, payload: posted.append(kind), flush=flush)
    link.start()
    try:
        assert _until(lambda: "connected" in posted)
        hold.set()
        link.sample_for(1)
        link.send(driver_commands.Zero())
        link.send(driver_commands.StartIntegration())
        assert _until(holding.is_set)
        # the instrument thread reads the next pushed lines while the commit waits ...
        assert _until(lambda: len(received) > waiting[0] + 1)
        # ... and the engine hears of none of their samples before their commit
        assert "samples" not in posted
        release.set()
        assert _until(lambda: "samples" in posted)
    finally:
        release.set()
        link.stop()
        link.join(10)
    assert not link.is_alive()
