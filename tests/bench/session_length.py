"""Benchmark: the daemon's CPU and the bytes it sends per reading, at set 500 of a session vs set 1.

    python -m tests.bench.session_length [--smoke]

Two station files are recorded through the real engine and store (in this process, as the
daemon would record them): a session whose routine set was taken (three readings) and redone
until it holds 499 sets, and a session with none. The real daemon (``chargebook serve``) then
resumes each in turn on the simulated electrometer, in a dialect where every pushed line is a
completed reading (``profiles/pushed-every-line.toml``), and takes the readings of the next set
(set 500, or set 1) as they are pushed at 50 lines/s, 50 readings/s, with a subscribed
client attached as the console would be.

* Baseline: at set 1, the daemon's CPU time (user + system, from the kernel's count of the
  process) per reading taken, and the bytes of the notifications a subscriber received per
  reading (counted on its socket, as sent).
* Measured: the same at set 500.

Target (issue 17, target 2): each at most 1.5 times its value at set 1.
"""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import json
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import psutil
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.protocol import MAX_DAEMON_MESSAGE_BYTES, Method
from chargebook.acquire.record.store import Store
from chargebook.drivers_generic import load_profile

from tests.bench import report
from tests.bench.harness import (
    MANY_READINGS_PLAN,
    PUSHED_EVERY_LINE,
    QUIET_STREAM,
    Station,
    read_db,
    scratch,
    station_in,
)

FULL_SETS, SMOKE_SETS = 500, 30
FULL_READINGS, SMOKE_READINGS = 60, 15
READINGS_PER_EARLIER_SET = 3
LINES_PER_S = 50.0  # each a completed reading (auto-reset): 50 readings/s
TARGET_RATIO = 1.5
DEADLINE_S = 60.0
#: Invented air data for the recorded sessions (demo only).
AIR = (21.5, 100.8)


def record_sets(db: Path, earlier_sets: int) -> int:
    """Record, through the real engine and store, a session of the benchmark's plan whose set
    was taken and redone ``earlier_sets`` times; leave it open, as at a crash. Return its id."""
    profile = load_profile(str(PUSHED_EVERY_LINE))
    clock = itertools.count(1000.0, 0.1)
    with Store.open(db) as store:
        engine = Engine(
            store,
            capabilities=profile.capabilities,
            clock=lambda: next(clock),
            default_plan=str(MANY_READINGS_PLAN),
            profile=profile.name,
        )
        session_id = engine.start_session(demo_metadata(), actor="operator A")
        engine.set_environment(*AIR, actor="operator A")
        if engine.pending_manual is not None:
            engine.manual_done("benchmark", actor="operator A")
        for number in range(earlier_sets):
            engine.arm(actor="operator A")
            for reading in range(READINGS_PER_EARLIER_SET):
                # invented charges (demo only): about 20 nC per reading
                engine.on_sample(next(clock), 20.0 + 0.001 * (number + reading), complete=True)
            engine.redo("benchmark: the next set", actor="operator A")
    return session_id


class CountingSubscriber:
    """A subscriber that counts the bytes of every notification it receives, as sent."""

    def __init__(self) -> None:
        self.notified_bytes = 0
        self._task: asyncio.Task | None = None
        self._writer: asyncio.StreamWriter | None = None

    async def attach(self, socket: Path) -> None:
        reader, writer = await asyncio.open_unix_connection(
            str(socket), limit=MAX_DAEMON_MESSAGE_BYTES + 1
        )
        self._writer = writer
        for number, method in enumerate((Method.HELLO, Method.SUBSCRIBE), start=1):
            writer.write(json.dumps({"jsonrpc": "2.0", "id": number, "method": method}).encode())
            writer.write(b"\n")
        self._task = asyncio.create_task(self._count(reader))

    async def _count(self, reader: asyncio.StreamReader) -> None:
        while line := await reader.readline():
            if b'"method"' in line[:60]:  # a notification, not a reply
                self.notified_bytes += len(line)

    async def close(self) -> None:
        if self._writer is not None:
            self._writer.close()
        if self._task is not None:
            self._task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._task


@dataclass(frozen=True)
class PerReading:
    """What one reading cost the daemon at one set of a session."""

    set_number: int
    readings: int
    cpu_ms: float
    notified_bytes: float


def readings_in(world: Station, set_id: int) -> int:
    return int(read_db(world.db, "SELECT count(*) FROM readings WHERE set_id = ?", (set_id,))[0][0])


async def take_readings(world: Station, readings: int) -> PerReading:
    """Resume the recorded session on the daemon, arm its next set, and return what each of
    ``readings`` readings cost."""
    daemon = world.start_daemon(MANY_READINGS_PLAN)
    process = psutil.Process(daemon.process.pid)
    client = await world.connect()
    counter = CountingSubscriber()
    try:
        await client.subscribe()
        await client.wait_for_snapshot(lambda s: s["instrument"]["connected"], DEADLINE_S)
        await counter.attach(world.socket)
        if Method.STEP_MANUAL_DONE in client.latest_snapshot["allowed"]:
            await client.call(Method.STEP_MANUAL_DONE, note="benchmark")
        snapshot = await client.call(Method.STEP_ARM)
        set_id = snapshot["current_set"]["id"]
        await asyncio.sleep(1.0)  # the arming's notifications are in
        cpu_before, bytes_before = sum(process.cpu_times()[:2]), counter.notified_bytes
        with world.bench() as bench:
            # Lines for the whole deadline, the rest unread: how many lines a reading takes
            # depends on the daemon's pace (a loaded machine took 12 of 15 from 150 lines).
            bench.flood(LINES_PER_S, int(LINES_PER_S * DEADLINE_S))
        deadline = time.monotonic() + DEADLINE_S
        while (taken := readings_in(world, set_id)) < readings:
            if time.monotonic() > deadline:
                raise RuntimeError(f"only {taken} of {readings} readings in {DEADLINE_S:g} s")
            await asyncio.sleep(0.01)
        cpu_after = sum(process.cpu_times()[:2])
        await asyncio.sleep(0.3)  # their notifications are in
        taken = readings_in(world, set_id)
        sent = counter.notified_bytes - bytes_before
    finally:
        await counter.close()
        await client.close()
        world.stop_daemon()
    return PerReading(
        len(snapshot["sets"]), taken, (cpu_after - cpu_before) * 1000 / taken, sent / taken
    )


def measure(earlier_sets: int, readings: int) -> PerReading:
    """Record a session of ``earlier_sets`` sets, then measure its next set's readings."""
    with scratch("session-length") as workdir:
        record_sets(workdir / "station.sqlite", earlier_sets)
        with station_in(workdir, PUSHED_EVERY_LINE, *QUIET_STREAM) as world:
            return asyncio.run(take_readings(world, readings))


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    sets, readings = (SMOKE_SETS, SMOKE_READINGS) if args.smoke else (FULL_SETS, FULL_READINGS)
    out = report.Report(
        f"session length: {readings} readings at set 1 and at set {sets} of a session",
        args.smoke,
    )
    first = measure(0, readings)
    late = measure(sets - 1, readings)
    for figures in (first, late):
        out.note(
            f"set {figures.set_number}: {figures.readings} readings, "
            f"{figures.cpu_ms:.2f} ms CPU and {figures.notified_bytes:,.0f} bytes sent each"
        )
    cpu_ratio = late.cpu_ms / first.cpu_ms
    bytes_ratio = late.notified_bytes / first.notified_bytes
    out.baseline("at set 1: daemon CPU per reading", first.cpu_ms, "ms")
    out.baseline("at set 1: bytes sent to a subscriber per reading", first.notified_bytes, "B")
    out.measured(f"at set {sets}: daemon CPU per reading", late.cpu_ms, "ms")
    out.measured(f"at set {sets}: bytes sent per reading", late.notified_bytes, "B")
    out.ratio(cpu_ratio, f"CPU per reading, set {sets} / set 1")
    out.ratio(bytes_ratio, f"bytes per reading, set {sets} / set 1")
    for what, ratio in (("CPU", cpu_ratio), ("bytes", bytes_ratio)):
        out.target(
            f"{what} per reading at set {sets} <= {TARGET_RATIO:g} x set 1",
            ratio <= TARGET_RATIO,
            f"{ratio / TARGET_RATIO - 1:.0%} over",
        )
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
