"""Fixtures that run the real thing: `chargebook simulate` and `chargebook serve` as subprocesses.

``tests/e2e/conftest.py`` imports the fixtures from here. Another test folder reuses them the
same way, with this folder on ``sys.path`` (see ``tests/e2e/conftest.py``)::

    sys.path.insert(0, str(Path(__file__).parents[1] / "e2e"))
    from e2e_support import daemon, metadata, simulator, start_daemon, start_simulator

Nothing is mocked. The simulated electrometer runs on a real pseudo-terminal with its control
socket (the bench: linac, bias switch, thermometer); the daemon runs on a real SQLite file and
listens on a real Unix socket; tests talk to it with the real ``DaemonClient``.

Fixtures (function scope; everything started is stopped at teardown):

``start_simulator(profile="query-plain", seed=1, time_scale=TIME_SCALE, *extra_args)``
    -> :class:`SimulatorProcess` with ``serial`` (pty path), ``control`` (control socket path),
    ``profile``, ``pid`` and ``bench()`` (a ``SimulatorControl`` client).
``start_daemon(simulator, db=None, plan=QUICK_PLAN, bench=True, time_scale=TIME_SCALE, *extra,
env=None)`` (``extra``: more `serve` options; ``env``: its environment)
    -> :class:`DaemonProcess` with ``socket``, ``db``, ``pid``, ``info`` (its ready line),
    ``connect(operator=...)`` (an async ``DaemonClient``), ``kill9()``, ``restart()``, ``stop()``.
``simulator``  a default simulator;  ``daemon``  a daemon on it with the quick plan.
``metadata``   the invented demo metadata (Example Clinic (fictional), demo only).

Each process's stderr goes to a log file under ``tmp_path``, printed when a test fails to start
one. The quick plan (``plans/quick.toml``) and TIME_SCALE keep a whole session to a few seconds.
"""

from __future__ import annotations

import os
import signal
import subprocess
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest
from chargebook.acquire.client import DaemonClient
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.processes import ChildStartError, chargebook_args, stop_child
from chargebook.acquire.processes import read_ready_line as ready_line
from chargebook.drivers_generic.simulator.control import SimulatorControl

#: Wall seconds per simulated second, for the simulator and the daemon alike.
TIME_SCALE = 0.02
QUICK_PLAN = str(Path(__file__).parent / "plans" / "quick.toml")


#: `chargebook ARGS` run with this interpreter (the demo's own helper).
chargebook_command = chargebook_args
#: End a process politely (SIGTERM), forcefully after 10 s, and reap it.
stop_process = stop_child


def read_ready_line(process: subprocess.Popen, log_path: Path) -> dict[str, Any]:
    """Return the JSON object a process prints first on stdout; fail with its log if it dies."""
    try:
        return ready_line(process, log_path, " ".join(map(str, process.args)))
    except ChildStartError as error:
        pytest.fail(str(error))


@dataclass
class SimulatorProcess:
    """A running `chargebook simulate --serial`."""

    process: subprocess.Popen
    info: dict[str, Any]
    log_path: Path

    @property
    def serial(self) -> str:
        return self.info["serial"]

    @property
    def control(self) -> str:
        return self.info["control"]

    @property
    def profile(self) -> str:
        return self.info["profile"]

    @property
    def pid(self) -> int:
        return self.info["pid"]

    def bench(self) -> SimulatorControl:
        """Return a client of the simulator's control socket (close it when done)."""
        return SimulatorControl(self.control)


@dataclass
class DaemonProcess:
    """A running `chargebook serve`; can be killed and restarted on the same file."""

    args: list[str]
    socket: Path
    db: Path
    log_path: Path
    process: subprocess.Popen | None = None
    info: dict[str, Any] = field(default_factory=dict)
    env: dict[str, str] | None = None  # the environment (None: this process's)

    @property
    def pid(self) -> int:
        assert self.process is not None
        return self.process.pid

    def start(self) -> DaemonProcess:
        """Start the daemon and wait for its ready line."""
        with self.log_path.open("ab") as log:
            self.process = subprocess.Popen(
                chargebook_command(*self.args), stdout=subprocess.PIPE, stderr=log, env=self.env
            )
        self.info = read_ready_line(self.process, self.log_path)
        return self

    def kill9(self) -> None:
        """Kill the daemon with SIGKILL, as a crash would, and reap it."""
        assert self.process is not None
        os.kill(self.process.pid, signal.SIGKILL)
        self.process.wait()
        self.process.stdout.close()  # type: ignore[union-attr]

    def restart(self) -> DaemonProcess:
        """Start the daemon again with the same options (same database, same socket)."""
        if self.process is not None and self.process.poll() is None:
            stop_process(self.process)
        return self.start()

    def stop(self) -> None:
        """Stop the daemon with SIGTERM."""
        if self.process is not None:
            stop_process(self.process)

    async def connect(self, operator: str | None = "test operator") -> DaemonClient:
        """Return a connected client of this daemon."""
        return await DaemonClient.connect(self.socket, client="e2e test", operator=operator)


@pytest.fixture
def start_simulator(tmp_path: Path) -> Iterator[Callable[..., SimulatorProcess]]:
    """Start `chargebook simulate --serial` processes; all are stopped at teardown."""
    started: list[SimulatorProcess] = []

    def start(
        profile: str = "query-plain", seed: int = 1, time_scale: float = TIME_SCALE, *extra: str
    ) -> SimulatorProcess:
        log_path = tmp_path / f"simulator-{len(started)}.log"
        args = ["simulate", "--serial", "--profile", profile, "--seed", str(seed)]
        args += ["--time-scale", str(time_scale), *extra]
        with log_path.open("wb") as log:
            process = subprocess.Popen(
                chargebook_command(*args), stdout=subprocess.PIPE, stderr=log
            )
        simulator = SimulatorProcess(process, read_ready_line(process, log_path), log_path)
        started.append(simulator)
        return simulator

    yield start
    for simulator in started:
        stop_process(simulator.process)


@pytest.fixture
def start_daemon(tmp_path: Path) -> Iterator[Callable[..., DaemonProcess]]:
    """Start `chargebook serve` processes on a simulator; all are stopped at teardown."""
    started: list[DaemonProcess] = []

    def start(
        simulator: SimulatorProcess,
        db: Path | None = None,
        plan: str = QUICK_PLAN,
        bench: bool = True,
        time_scale: float = TIME_SCALE,
        *extra: str,
        env: dict[str, str] | None = None,
    ) -> DaemonProcess:
        number = len(started)
        socket_path = tmp_path / f"run-{number}" / "daemon.sock"
        db_path = db or tmp_path / f"station-{number}.sqlite"
        args = ["serve", "--profile", simulator.profile, "--port", simulator.serial]
        args += ["--db", str(db_path), "--socket", str(socket_path), "--plan", plan]
        args += ["--time-scale", str(time_scale), "--log-level", "INFO"]
        args += ["--config", os.devnull]  # no station file of this machine
        if bench:
            args += ["--bench-control", simulator.control]
        args += extra
        log_path = tmp_path / f"daemon-{number}.log"
        daemon = DaemonProcess(args, socket_path, db_path, log_path, env=env)
        started.append(daemon)
        return daemon.start()

    yield start
    for daemon in started:
        daemon.stop()


@pytest.fixture
def simulator(start_simulator: Callable[..., SimulatorProcess]) -> SimulatorProcess:
    """A simulated electrometer (query-plain dialect: query mode, remote bias) on a pty."""
    return start_simulator()


@pytest.fixture
def daemon(
    start_daemon: Callable[..., DaemonProcess], simulator: SimulatorProcess
) -> DaemonProcess:
    """The real daemon on ``simulator`` with the quick plan and the bench attached."""
    return start_daemon(simulator)


@pytest.fixture
def metadata() -> dict[str, Any]:
    """The invented demo session metadata (Example Clinic (fictional); demo only)."""
    return demo_metadata()
