"""Fault run: a suspended console and 20 stalled clients while sessions run.

    python -m tests.faults.stalled_clients [--smoke]

The automatic operator takes sessions through (quick plan, simulated electrometer, bench
attached). First, unloaded, the run notes how long each reading waited between the arrival of
its raw line and its commit (the traffic row's and the reading's ``recorded_at``, both stamped
by the daemon), and a probe client's ``status`` round trip. Then, for ``STALL_S`` (60 s; a few
seconds in the smoke run), a real ``chargebook console`` on a pseudo-terminal is suspended with
SIGSTOP (as Ctrl-Z does) and 20 more clients connect, subscribe and never read a byte, while the
sessions go on; the probe keeps asking.

Counted: readings delayed beyond the normal rate (a wait from raw line to commit longer than
twice the longest unloaded one, and at least 50 ms longer), readings taken under load, and the
probe's round trip (median) under load against its unloaded median. Targets (issue 10): 0
readings delayed, every other client's round trip within 2 × its unloaded time.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import pty
import signal
import socket
import statistics
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from datetime import datetime

from chargebook.acquire import protocol
from chargebook.acquire.client import DaemonClient
from chargebook.acquire.processes import chargebook_args

from tests.bench import report
from tests.bench.harness import Station, read_db
from tests.faults.sessions import Witness, operate, quick_station, stop, until, watched_client

STALLED_CLIENTS = 20
#: How long the console stays suspended and the clients stalled, s: (full run, smoke run).
STALL_S = (60.0, 4.0)
#: Unloaded phase before the stall, s: (full run, smoke run).
UNLOADED_S = (20.0, 4.0)
PROBE_INTERVAL_S = 0.1
#: A reading counts as delayed when it waited more than this many times the longest unloaded
#: wait, and at least DELAY_FLOOR_S longer.
DELAY_FACTOR, DELAY_FLOOR_S = 2.0, 0.05

_WAITS_SQL = """
SELECT readings.id, readings.recorded_at, traffic.recorded_at
FROM readings JOIN traffic ON traffic.id = readings.traffic_id
WHERE readings.id > ?
"""


def reading_waits(world: Station, after_id: int) -> dict[int, float]:
    """Return, per reading after ``after_id``, the seconds from its raw line to its commit."""
    rows = read_db(world.db, _WAITS_SQL, (after_id,))
    return {
        reading: (datetime.fromisoformat(done) - datetime.fromisoformat(line)).total_seconds()
        for reading, done, line in rows
    }


def last_reading_id(world: Station) -> int:
    """Return the newest reading's id (0 when none)."""
    return int(read_db(world.db, "SELECT coalesce(max(id), 0) FROM readings")[0][0])


@contextlib.contextmanager
def console_on_a_pty(world: Station) -> Iterator[subprocess.Popen]:
    """Run ``chargebook console`` on a pseudo-terminal (its screen read and thrown away)."""
    master, slave = pty.openpty()
    env = {**os.environ, "TERM": "xterm-256color", "COLUMNS": "100", "LINES": "30"}
    command = chargebook_args("console", "--socket", str(world.socket), "--operator", "stalled")
    process = subprocess.Popen(
        command, stdin=slave, stdout=slave, stderr=slave, env=env, start_new_session=True
    )
    os.close(slave)
    reader = threading.Thread(target=_drain, args=(master,), daemon=True)
    reader.start()
    try:
        yield process
    finally:
        with contextlib.suppress(ProcessLookupError):
            process.send_signal(signal.SIGCONT)
            process.kill()
        process.wait()
        os.close(master)


def _drain(fd: int) -> None:
    with contextlib.suppress(OSError):
        while os.read(fd, 65536):
            pass


def stalled_client(world: Station) -> socket.socket:
    """Return a connection that said hello and subscribed, and will never read."""
    connection = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    connection.connect(str(world.socket))
    for number, method in enumerate((protocol.Method.HELLO, protocol.Method.SUBSCRIBE), 1):
        connection.sendall(protocol.encode(protocol.request(number, method, {})))
    return connection


async def probe(client: DaemonClient, seconds: float) -> list[float]:
    """Return the round trips of ``status`` calls made for ``seconds``, s."""
    trips: list[float] = []
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        started = time.perf_counter()
        await client.status()
        trips.append(time.perf_counter() - started)
        await asyncio.sleep(PROBE_INTERVAL_S)
    return trips


async def stall_run(world: Station, unloaded_s: float, stall_s: float) -> dict:
    """Run sessions unloaded, then with a suspended console and stalled clients; count."""
    witness = Witness()
    operator_client = await watched_client(world, witness)
    operator = asyncio.create_task(operate(operator_client, world))
    probe_client = await world.connect(operator="probe")
    try:
        first = last_reading_id(world)
        unloaded_trips = await probe(probe_client, unloaded_s)
        with console_on_a_pty(world) as console:
            await until(lambda: _clients(world) >= 3, "the console to connect", 60)
            await asyncio.sleep(1.0)  # let it take its first snapshots
            middle = last_reading_id(world)
            console.send_signal(signal.SIGSTOP)
            stalled = [stalled_client(world) for _ in range(STALLED_CLIENTS)]
            loaded_trips = await probe(probe_client, stall_s)
            end = last_reading_id(world)
            for connection in stalled:
                connection.close()
            console.send_signal(signal.SIGCONT)
        operator_alive = not operator.done()
    finally:
        await stop(operator)
        await operator_client.close()
        await probe_client.close()
    waits = reading_waits(world, first)
    unloaded = [wait for reading, wait in waits.items() if reading <= middle]
    loaded = [wait for reading, wait in waits.items() if middle < reading <= end]
    longest = max(unloaded) if unloaded else 0.0
    limit = max(longest * DELAY_FACTOR, longest + DELAY_FLOOR_S)
    return {
        "unloaded_readings": len(unloaded),
        "loaded_readings": len(loaded),
        "longest_unloaded_s": longest,
        "longest_loaded_s": max(loaded) if loaded else 0.0,
        "delayed": sum(wait > limit for wait in loaded),
        "limit_s": limit,
        "unloaded_trip_s": statistics.median(unloaded_trips),
        "loaded_trip_s": statistics.median(loaded_trips),
        "loaded_trip_max_s": max(loaded_trips),
        "operator_alive": operator_alive,
        "daemon_alive": world.daemon_alive(),
    }


def _clients(world: Station) -> int:
    """Return how many clients the daemon's log says connected so far."""
    return world.daemon_logs().count(" connected")


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    pick = 1 if args.smoke else 0
    stall_s = STALL_S[pick]
    out = report.Report(
        f"a console suspended for {stall_s:g} s and {STALLED_CLIENTS} stalled clients, mid-session",
        args.smoke,
    )
    with quick_station("stalled") as world:
        counts = asyncio.run(stall_run(world, UNLOADED_S[pick], stall_s))
    out.note(
        f"readings: {counts['unloaded_readings']} unloaded (longest wait from raw line to commit "
        f"{counts['longest_unloaded_s'] * 1000:.1f} ms), {counts['loaded_readings']} under load "
        f"(longest {counts['longest_loaded_s'] * 1000:.1f} ms; delayed means over "
        f"{counts['limit_s'] * 1000:.1f} ms)"
    )
    out.note(f"probe round trip under load: longest {counts['loaded_trip_max_s'] * 1000:.2f} ms")
    out.baseline("probe status round trip, unloaded (median)", counts["unloaded_trip_s"], "s")
    out.measured("probe status round trip, under load (median)", counts["loaded_trip_s"], "s")
    ratio = counts["loaded_trip_s"] / counts["unloaded_trip_s"]
    out.ratio(ratio, "loaded / unloaded round trip")
    delayed = counts["delayed"]
    out.target("0 readings delayed", delayed == 0, f"{delayed} delayed", timing=True)
    out.target("round trip within 2 x unloaded", ratio <= 2.0, f"{ratio:.2f} x", timing=True)
    out.target(
        "readings went on under load, daemon and operator up",
        counts["loaded_readings"] > 0 and counts["daemon_alive"] and counts["operator_alive"],
    )
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
