"""Benchmark: reading lines per second through the whole daemon, against raw pyserial.

    python -m tests.bench.pipeline [--smoke]

The simulated electrometer (push-exponent dialect, push mode) floods its pseudo-terminal with
reading lines as fast as the reader takes them (``SimulatorControl.flood(0, count)``).

* Baseline: pyserial reads the same pty, the same lines with the same terminator, with
  ``readline`` on an ``io.BufferedReader`` (64 KiB) over the port (timeout 0.05 s). pyserial's
  own ``Serial.readline`` reads one byte per system call, which would flatter us by a factor of
  ten or more; it is printed as a note, not used.
* Measured: the real daemon (``chargebook serve``) with a reading armed (a timed leakage
  integration): every line goes through the driver (framing, parsing), is committed to the
  station database as raw traffic, and its sample is handed to the engine's capture. The clock
  stops when the last line is committed; the daemon is then asked for its status, which it
  answers only after the samples queued before the request.

Targets: at least 80 % of the baseline (issue 17, target 3), and at least 10 times the line
rate of a 115200-baud port (issue 7: about 720 readings/s, so 7200 readings/s).

Each round also notes the CPU time spent per line: the simulated electrometer's while the raw
reader reads (the raw reader itself spends well under a microsecond a line: the simulator
writing the lines is what sets the baseline's rate) and the daemon's (its process, both
threads, while it reads, commits and feeds the engine). On a machine shared with other work
the rates swing with the load; CPU per line swings much less, and says where the ratio would
settle on a quiet machine with a core for each.
"""

from __future__ import annotations

import asyncio
import io
import sqlite3
import sys
import time
from typing import Any

import psutil
from chargebook.acquire.client import DaemonClient
from chargebook.acquire.protocol import Method

from tests.bench import report
from tests.bench.harness import (
    QUIET_STREAM,
    Station,
    collecting_daemon,
    last_traffic_id,
    station,
)

FULL_COUNT = 200_000
SMOKE_COUNT = 3_000
ROUNDS = 5
#: The line rate of a 115200-baud port as issue 7 counts it, readings/s.
PORT_115200_PER_S = 720.0
RATIO_TARGET = 0.8
ABSOLUTE_TARGET_PER_S = 10 * PORT_115200_PER_S
POLL_S = 0.01
GIVE_UP_S = 300.0
SETTLE_S = 0.3
#: How long the flood may stay silent before the raw reader gives up on it, s.
FLOOD_SILENCE_S = 5.0


def raw_readline_per_s(world: Station, count: int, *, buffered: bool = True) -> float:
    """Return the lines per second pyserial's readline takes from a flood of ``count`` lines."""
    return raw_readline(world, count, buffered=buffered)[0]


def raw_readline(world: Station, count: int, *, buffered: bool = True) -> tuple[float, float]:
    """Return (lines per second, the simulator's CPU seconds per line) of pyserial's readline
    on a flood of ``count`` lines."""
    import serial

    assert world.simulator is not None
    simulator = psutil.Process(world.simulator.process.pid)
    # pyserial's read waits for the whole buffer or its timeout: a short timeout, so that the
    # flood's last lines are not held back (a longer one would add its wait to the baseline).
    port = serial.serial_for_url(world.serial, baudrate=115200, timeout=0.05)
    reader = io.BufferedReader(port, 65536) if buffered else port
    try:
        with world.bench() as bench:
            started, cpu_started = time.perf_counter(), _cpu_s(simulator)
            bench.flood(0, count)
            received = _read_lines(reader, count)
            elapsed, cpu_s = time.perf_counter() - started, _cpu_s(simulator) - cpu_started
    finally:
        port.close()
    if received != count:
        raise RuntimeError(f"raw readline received {received} of {count} lines")
    return count / elapsed, cpu_s / count


def _read_lines(reader: Any, count: int) -> int:
    """Read lines until ``count`` have come or the flood has been silent FLOOD_SILENCE_S;
    return how many came. A read's timeout can cut a line in two: only its end counts. A
    loaded machine left the simulator unscheduled for longer than one 50 ms timeout (a run
    that stopped at the first empty read ended at 60,838 of 200,000 lines)."""
    received, silent_since = 0, None
    while received < count:
        line = reader.readline()
        if line:
            received += line.endswith(b"\n")
            silent_since = None
        elif silent_since is None:
            silent_since = time.perf_counter()
        elif time.perf_counter() - silent_since > FLOOD_SILENCE_S:
            break
    return received


def _cpu_s(process: psutil.Process) -> float:
    times = process.cpu_times()
    return times.user + times.system


async def daemon_per_s(world: Station, client: DaemonClient, count: int) -> float:
    """Return the lines per second the collecting daemon commits and hands to its engine."""
    return (await daemon_rate(world, client, count))[0]


async def daemon_rate(world: Station, client: DaemonClient, count: int) -> tuple[float, float]:
    """Return (lines per second, CPU seconds per line) of the collecting daemon as it commits
    the lines and hands their samples to its engine."""
    assert world.daemon is not None
    daemon = psutil.Process(world.daemon.process.pid)
    await asyncio.sleep(SETTLE_S)  # let the arming commands' lines land first
    first_id = last_traffic_id(world.db)
    watch = sqlite3.connect(f"{world.db.resolve().as_uri()}?mode=ro", uri=True)
    try:
        with world.bench() as bench:
            started, cpu_started = time.perf_counter(), _cpu_s(daemon)
            bench.flood(0, count)
            await _wait_for_lines(watch, first_id, count, started)
            elapsed, cpu_s = time.perf_counter() - started, _cpu_s(daemon) - cpu_started
        status = await client.status()
        received = watch.execute(
            "SELECT count(*) FROM traffic WHERE id > ? AND direction = 'rx'", (first_id,)
        ).fetchone()[0]
    finally:
        watch.close()
    if status["state"] != "collecting" or received < count:
        raise RuntimeError(f"the daemon recorded {received} of {count} lines ({status['state']})")
    return count / elapsed, cpu_s / count


async def _wait_for_lines(watch: sqlite3.Connection, first_id: int, count: int, started: float):
    while True:
        newest = watch.execute("SELECT coalesce(max(id), 0) FROM traffic").fetchone()[0]
        if newest - first_id >= count:
            return
        if time.perf_counter() - started > GIVE_UP_S:
            raise RuntimeError(f"only {newest - first_id} of {count} lines after {GIVE_UP_S} s")
        await asyncio.sleep(POLL_S)


async def interleaved(
    world: Station, count: int, rounds: int
) -> tuple[list[float], list[float], list[float], list[float], list[float]]:
    """Return (raw rates, daemon rates, raw CPU s per line, daemon CPU s per line, the
    daemon's CPU s per line logging the samples at the pause) of ``rounds`` alternating runs
    on the same pty.

    Between its runs the daemon's session is paused: it then does not read the port, and the
    raw reader has the lines to itself. The pause is the first input since the flood that
    writes, so it logs every sample the flood brought in the input log (replay re-applies
    them): the CPU that takes, per line, is noted apart (it is outside the timed window).
    """
    client = await collecting_daemon(world)
    assert world.daemon is not None
    process = psutil.Process(world.daemon.process.pid)
    raw, daemon, raw_cpu, daemon_cpu, log_cpu = [], [], [], [], []
    try:
        for number in range(rounds):
            if number:
                snapshot = await client.call(Method.SESSION_RESUME)
                if snapshot["state"] != "collecting":
                    raise RuntimeError(f"the daemon is {snapshot['state']}, not collecting")
            rate, cpu = await daemon_rate(world, client, count)
            daemon.append(rate)
            daemon_cpu.append(cpu)
            cpu_before = _cpu_s(process)
            snapshot = await client.call(Method.SESSION_PAUSE)
            log_cpu.append((_cpu_s(process) - cpu_before) / count)
            await asyncio.sleep(SETTLE_S)
            rate, cpu = raw_readline(world, count)
            raw.append(rate)
            raw_cpu.append(cpu)
    finally:
        await client.close()
    return raw, daemon, raw_cpu, daemon_cpu, log_cpu


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    count = SMOKE_COUNT if args.smoke else FULL_COUNT
    rounds = 1 if args.smoke else ROUNDS
    out = report.Report(
        f"pipeline: {count} reading lines flooded on a pty (push-exponent, push mode), "
        f"{rounds} round(s)",
        args.smoke,
    )
    with station("pipeline", "push-exponent", *QUIET_STREAM) as world:
        naive = raw_readline_per_s(world, max(count // 20, 500), buffered=False)
        raw, daemon, raw_cpu, daemon_cpu, log_cpu = asyncio.run(interleaved(world, count, rounds))
    ratios = [d / r for d, r in zip(daemon, raw, strict=True)]
    out.note(
        "rounds, raw / daemon readings/s: "
        + ", ".join(f"{r:.0f} / {d:.0f}" for r, d in zip(raw, daemon, strict=True))
    )
    out.note(
        "rounds, CPU µs per line, the simulator writing (raw rounds) / the daemon: "
        + ", ".join(
            f"{r * 1e6:.1f} / {d * 1e6:.1f}" for r, d in zip(raw_cpu, daemon_cpu, strict=True)
        )
        + f" (simulator / daemon, median: "
        f"{report.median([r / d for r, d in zip(raw_cpu, daemon_cpu, strict=True)]):.2f})"
    )
    out.note(
        "rounds, the daemon's CPU µs per line logging the flood's samples at the pause "
        "(outside the timed window): " + ", ".join(f"{c * 1e6:.1f}" for c in log_cpu)
    )
    out.note(f"pyserial's unbuffered Serial.readline (one read per byte): {naive:.0f}/s (not used)")
    baseline, measured, ratio = report.median(raw), report.median(daemon), report.median(ratios)
    out.baseline(
        "raw pyserial readline, buffered, same pty and lines (median)", baseline, "readings/s"
    )
    out.measured("daemon: driver -> store (committed) -> engine (median)", measured, "readings/s")
    out.ratio(ratio, "median of the rounds' measured / baseline")
    out.target(
        f"ratio >= {RATIO_TARGET}", ratio >= RATIO_TARGET, f"{ratio / RATIO_TARGET:.0%} of it"
    )
    out.target(
        f"measured >= {ABSOLUTE_TARGET_PER_S:.0f} readings/s (10 x a 115200-baud port)",
        measured >= ABSOLUTE_TARGET_PER_S,
        f"{measured / ABSOLUTE_TARGET_PER_S:.0%} of it",
    )
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
