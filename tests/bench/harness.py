"""The real processes the benchmark and fault scripts measure, started as a user starts them.

``chargebook simulate`` (the simulated electrometer on a real pseudo-terminal, with its control
socket) and ``chargebook serve`` (the daemon, on a real SQLite file and a real Unix socket) run
as subprocesses through the demo's own helpers; scripts talk to the daemon with the real
``DaemonClient`` and to the bench with ``SimulatorControl``. Nothing is mocked.

Everything lives in a scratch directory on disk (not in memory), removed at the end unless
``CHARGEBOOK_BENCH_KEEP`` is set, so the store pays for real fsyncs as a station's would.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import psutil
from chargebook.acquire.client import DaemonClient
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.processes import Child, start_child, stop_child
from chargebook.acquire.protocol import Method
from chargebook.drivers_generic.simulator.control import SimulatorControl

HERE = Path(__file__).resolve().parent
REPO = HERE.parents[1]
FLOOD_PLAN = HERE / "plans" / "flood.toml"
MANY_READINGS_PLAN = HERE / "plans" / "many_readings.toml"
PUSHED_EVERY_LINE = HERE / "profiles" / "pushed-every-line.toml"
#: A push-mode dialect whose lines are samples; the simulator's own streaming is slowed to one
#: line per 10 s (``--time-scale 100``) so that nearly every line on the wire is a flood line.
QUIET_STREAM = ("--time-scale", "100")


@contextlib.contextmanager
def scratch(prefix: str) -> Iterator[Path]:
    """Yield a private scratch directory on disk; remove it afterwards (unless told to keep)."""
    path = Path(tempfile.mkdtemp(prefix=f"chargebook-{prefix}-"))
    try:
        yield path
    finally:
        if os.environ.get("CHARGEBOOK_BENCH_KEEP"):
            print(f"  (kept {path})")
        else:
            shutil.rmtree(path, ignore_errors=True)


@dataclass
class Station:
    """An electrometer's port and, once started, a daemon on it, in one scratch directory.

    The port is usually a ``chargebook simulate`` process's pty (``simulator``, with its
    control socket); a fault run may serve the pty from its own process instead.
    """

    workdir: Path
    profile: str | Path
    serial: str
    control: str | None = None
    simulator: Child | None = None
    daemon: Child | None = None
    daemon_args: list[str] = field(default_factory=list)
    starts: int = 0

    @property
    def db(self) -> Path:
        return self.workdir / "station.sqlite"

    @property
    def socket(self) -> Path:
        return self.workdir / "run" / "daemon.sock"

    def bench(self, timeout_s: float = 120.0) -> SimulatorControl:
        """Return a client of the simulator's control socket (close it when done)."""
        if self.control is None:
            raise RuntimeError("this station has no simulator control socket")
        return SimulatorControl(self.control, timeout_s=timeout_s)

    def start_daemon(
        self, plan: Path | str, *, bench: bool = False, time_scale: float = 1.0, log: str = "INFO"
    ) -> Child:
        """Start `chargebook serve` on the simulator; return it once it is ready."""
        args = ["serve", "--profile", str(self.profile), "--port", self.serial]
        args += ["--db", str(self.db), "--socket", str(self.socket), "--plan", str(plan)]
        args += ["--time-scale", str(time_scale), "--log-level", log]
        if bench:
            args += ["--bench-control", self.control]
        self.daemon_args = args
        return self.restart_daemon()

    def restart_daemon(self) -> Child:
        """Start the daemon again with the same options, on the same database and socket."""
        self.starts += 1
        log_path = self.workdir / f"daemon-{self.starts}.log"
        self.daemon = start_child("daemon", self.daemon_args, log_path)
        return self.daemon

    def kill_daemon(self) -> None:
        """Kill the daemon with SIGKILL, as a crash or a power cut would, and reap it."""
        assert self.daemon is not None
        process = self.daemon.process
        os.kill(process.pid, signal.SIGKILL)
        process.wait()
        if process.stdout is not None:
            process.stdout.close()

    def daemon_alive(self) -> bool:
        """Return True while the daemon process runs."""
        return self.daemon is not None and self.daemon.process.poll() is None

    def daemon_logs(self) -> str:
        """Return every daemon log of this station, oldest first."""
        logs = sorted(self.workdir.glob("daemon-*.log"), key=lambda p: int(p.stem.split("-")[1]))
        return "".join(path.read_text(errors="replace") for path in logs)

    def daemon_rss_bytes(self) -> int:
        """Return the daemon's resident memory now, in bytes."""
        assert self.daemon is not None
        return psutil.Process(self.daemon.process.pid).memory_info().rss

    async def connect(self, operator: str = "bench") -> DaemonClient:
        """Return a client connected to the daemon."""
        return await DaemonClient.connect(self.socket, client="bench", operator=operator)

    def stop_daemon(self) -> None:
        """Stop the daemon (SIGTERM, SIGKILL after 10 s); the simulator keeps running."""
        if self.daemon is not None:
            stop_child(self.daemon.process)

    def stop(self) -> None:
        """Stop the daemon and the simulator (SIGTERM, SIGKILL after 10 s)."""
        self.stop_daemon()
        if self.simulator is not None:
            stop_child(self.simulator.process)


@contextlib.contextmanager
def station(
    prefix: str, profile: str | Path = "push-exponent", *simulator_options: str
) -> Iterator[Station]:
    """Yield a Station with a running simulator; everything is stopped and removed afterwards."""
    with scratch(prefix) as workdir, station_in(workdir, profile, *simulator_options) as world:
        yield world


@contextlib.contextmanager
def station_in(
    workdir: Path, profile: str | Path = "push-exponent", *simulator_options: str
) -> Iterator[Station]:
    """Yield a Station in ``workdir`` with a running simulator; stop everything afterwards."""
    args = ["simulate", "--serial", "--profile", str(profile), *simulator_options]
    simulator = start_child("simulated electrometer", args, workdir / "simulator.log")
    info = simulator.info
    world = Station(workdir, profile, info["serial"], info["control"], simulator)
    try:
        yield world
    finally:
        world.stop()


async def arm_first_step(client: DaemonClient, metadata: dict[str, Any] | None = None) -> dict:
    """Open a session on the daemon and take it to its first reading: return the snapshot.

    Enters the demo metadata (invented: Example Clinic (fictional)) and a plausible air
    temperature and pressure, confirms the manual bias step the profile may need, and arms.
    """
    snapshot = await client.call(Method.SESSION_START, metadata=metadata or demo_metadata())
    snapshot = await client.call(Method.ENVIRONMENT_SET, temperature_C=21.5, pressure=100.8)
    if Method.STEP_MANUAL_DONE in snapshot["allowed"]:
        snapshot = await client.call(Method.STEP_MANUAL_DONE, note="benchmark")
    return await client.call(Method.STEP_ARM)


def run_smoke(module: str) -> subprocess.CompletedProcess[str]:
    """Run ``python -m <module> --smoke`` from the repository root; return what it did."""
    return subprocess.run(
        [sys.executable, "-m", module, "--smoke"],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=110,
        check=False,
    )


async def collecting_daemon(world: Station, plan: Path = FLOOD_PLAN) -> DaemonClient:
    """Start the daemon on ``plan`` and arm its first step; return a client of it.

    Raises RuntimeError when the daemon is not collecting then (the flood plan's long timed
    leakage integration keeps it collecting for an hour, reading every line pushed).
    """
    world.start_daemon(plan)
    client = await world.connect()
    snapshot = await arm_first_step(client)
    if snapshot["state"] != "collecting":
        await client.close()
        raise RuntimeError(f"the daemon is {snapshot['state']}, not collecting")
    await commands_answered(world.db)
    return client


async def commands_answered(db: Path, deadline_s: float = 30.0) -> None:
    """Wait until the instrument has answered every command the daemon sent in the newest
    session (as many lines received as sent: the quiet stream pushes none of its own). The arm
    request returns before the electrometer acknowledged its start; lines pushed before that
    are older than the reading and are not taken, so a flood waits for this.

    Raises RuntimeError when the answers are not all recorded within ``deadline_s``.
    """
    sql = (
        "SELECT count(*), coalesce(sum(direction = 'rx'), 0) FROM traffic "
        "WHERE session_id = (SELECT max(id) FROM sessions)"
    )
    waited_s = 0.0
    while True:
        ((lines, received),) = read_db(db, sql)
        if lines and 2 * received >= lines:
            return
        if waited_s >= deadline_s:
            raise RuntimeError(f"{lines - received} command(s) unanswered after {deadline_s} s")
        await asyncio.sleep(0.02)
        waited_s += 0.02


def read_db(db: Path, sql: str, params: tuple = ()) -> list[tuple]:
    """Return the rows of one query on the station database, opened read-only."""
    connection = sqlite3.connect(f"{db.resolve().as_uri()}?mode=ro", uri=True, timeout=10)
    try:
        return connection.execute(sql, params).fetchall()
    finally:
        connection.close()


def last_traffic_id(db: Path) -> int:
    """Return the id of the newest raw line recorded (0 when none)."""
    return int(read_db(db, "SELECT coalesce(max(id), 0) FROM traffic")[0][0])
