"""The real daemon in the test's own process, its electrometer the simulator on a hand clock.

:class:`InProcessDaemon` is the real :class:`~chargebook.acquire.daemon.daemon.Daemon`: its
engine, its instrument thread, its real SQLite file and its real Unix sockets, spoken to with the
real ``DaemonClient``. Only the wire is replaced: the simulator's dialect answers on an in-memory
wire (``drivers_generic/simulator/memory_wire.py``) and the bench (linac, bias switch,
thermometer) is the simulated device itself. Instrument time is a
:class:`~chargebook.drivers_generic.simulator.hand_clock.HandClock` shared by the device, the
driver and the daemon, so a beam takes no wall time and a cable is pulled at the moment a test
chooses.

``async with running(daemon) as daemon:`` starts it; time stands still until the test moves it:
``daemon.time.advance(s)``, or :meth:`InProcessDaemon.let_time_run` (a task that moves the clock
one poll interval at a time, each step once the instrument thread has read the electrometer at
the step before, so no reading is skipped however loaded the machine; at full speed, or at the
pace of a real clock for a console under test).

Use this for what the engine and daemon decide; the pty and the processes are proven by the
end-to-end tests in ``tests/e2e`` (the real ``chargebook serve`` on ``chargebook simulate``).
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

from chargebook.acquire.client import DaemonClient
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.commands.operator_auto import ACTOR, AutoOperator, Environment
from chargebook.acquire.daemon.bench import DOSE_RATE_MU_PER_MIN, BenchError
from chargebook.acquire.daemon.daemon import POLL_INTERVAL_S, Daemon, DaemonOptions
from chargebook.drivers_generic.simulator.device import SimulatorBusy, SimulatorInputError
from chargebook.drivers_generic.simulator.hand_clock import HandClock
from chargebook.drivers_generic.simulator.memory_wire import (
    InProcessElectrometer,
    in_process_electrometer,
)

#: The end-to-end tests' short plan and time scale (tests/e2e/plans/quick.toml).
QUICK_PLAN = str(Path(__file__).parents[1] / "e2e" / "plans" / "quick.toml")
TIME_SCALE = 0.02
#: Longest real wait for the instrument thread to read the electrometer after a step, s: past
#: it the clock moves on anyway (the thread may be reconnecting, or not reading at all).
CATCH_UP_S = 2.0


class DeviceBench:
    """The bench of the daemon (linac, bias switch, thermometer): the simulated device itself."""

    def __init__(self, sim: InProcessElectrometer) -> None:
        self.sim = sim

    def deliver(self, mu: float, *, wait: bool = False) -> dict[str, Any]:
        """Start delivering ``mu`` MU at the bench's dose rate."""
        try:
            return self.sim.device.beam(mu, DOSE_RATE_MU_PER_MIN)
        except (SimulatorBusy, SimulatorInputError) as error:
            raise BenchError(f"the bench refused to deliver {mu:g} MU: {error}") from error

    def turn_bias(self, volts: float) -> dict[str, Any]:
        """Turn the bias switch to ``volts`` (signed)."""
        return {"volts": self.sim.device.set_bias(volts)}

    def environment(self) -> Environment:
        """Return what the bench thermometer and barometer read, as the operator enters it."""
        air = self.sim.device.environment()
        return Environment(air["temperature_C"], air["pressure_kPa"], "bench (in process)")

    def close(self) -> None:
        """Nothing to close: the bench is in this process."""


class InProcessDaemon(Daemon):
    """The real daemon with the simulated electrometer in this process (module docstring)."""

    def __init__(
        self,
        directory: Path,
        *,
        profile: str = "query-plain",
        plan: str = QUICK_PLAN,
        seed: int = 1,
        time_scale: float = TIME_SCALE,
        bench: bool = True,
        db_path: Path | None = None,
    ) -> None:
        self.time = HandClock()
        options = DaemonOptions(
            profile=profile,
            db_path=db_path or directory / "station.sqlite",
            socket_path=directory / "run" / "daemon.sock",
            port=str(directory / "in-memory wire"),  # never opened: the wire is replaced
            plan=plan,
            time_scale=time_scale,
        )
        super().__init__(options, clock=self.time)
        self.sim = in_process_electrometer(
            profile, seed=seed, time_scale=time_scale, clock=self.time, pause=self.time.pause
        )
        self.bench = DeviceBench(self.sim) if bench else None
        self._runner: asyncio.Task[None] | None = None
        self._task: asyncio.Task[None] | None = None

    def _build(self) -> None:
        """Build the daemon as ``serve`` does, then put the in-process electrometer and bench on
        its instrument thread (before the thread starts)."""
        super()._build()
        assert self.link is not None and self.engine is not None
        self.sim.wire.traffic = self._record_traffic
        self.link.electrometer = self.sim.driver
        self.link.bench = self.bench
        self.engine.bench = self.bench is not None

    # -- running -------------------------------------------------------------------------------
    async def start(self) -> None:
        """Start serving on this loop; return once the sockets listen (raise why if it fails)."""
        ready = asyncio.Event()
        self._task = asyncio.create_task(self.run(lambda info: ready.set()), name="daemon")
        ready_wait = asyncio.create_task(ready.wait())
        await asyncio.wait({self._task, ready_wait}, return_when=asyncio.FIRST_COMPLETED)
        if self._task.done():
            ready_wait.cancel()
            self._task.result()

    async def stop(self) -> None:
        """Stop as SIGTERM would and wait until the station file and its lock are released."""
        await self.stop_time()
        task, self._task = self._task, None
        if task is not None:
            self.shutdown("SIGTERM")
            await task

    # -- time ----------------------------------------------------------------------------------
    def let_time_run(self, real_s_per_step: float = 0.0) -> None:
        """Move the hand clock on, one poll interval per step, until :meth:`stop_time`; each
        step also lasts ``real_s_per_step`` real seconds at least (0: as fast as the daemon
        reads; POLL_INTERVAL_S: the pace of a real clock, for a console that draws each live
        snapshot as a person would see it)."""
        if self._runner is None:
            self._runner = asyncio.create_task(self._run_time(real_s_per_step), name="hand clock")

    async def stop_time(self) -> None:
        """Stop moving the clock (after the step in progress)."""
        runner, self._runner = self._runner, None
        if runner is not None:
            runner.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await runner

    async def _run_time(self, real_s_per_step: float) -> None:
        while True:
            now_s = self.time.advance(POLL_INTERVAL_S)
            await asyncio.gather(self.caught_up(now_s), asyncio.sleep(real_s_per_step))

    async def caught_up(self, now_s: float) -> None:
        """Return once the instrument thread has read the electrometer at ``now_s`` or later
        (at once when it is not reading), and the loop has taken what it read."""
        waited_s = 0.0
        while waited_s < CATCH_UP_S and self._reading() and not self._served_since(now_s):
            await asyncio.sleep(0.001)
            waited_s += 0.001
        await asyncio.sleep(0)  # the engine takes the samples posted meanwhile

    def _reading(self) -> bool:
        link = self.link
        return link is not None and link.generation is not None and self.sim.wire.plugged

    def _served_since(self, now_s: float) -> bool:
        served_s = self.sim.wire.served_at_s
        return served_s is not None and served_s >= now_s

    # -- clients -------------------------------------------------------------------------------
    @property
    def socket(self) -> Path:
        """The control socket (as ``DaemonProcess.socket`` of the end-to-end fixtures)."""
        return self.options.socket_path

    @property
    def db(self) -> Path:
        """The station file (as ``DaemonProcess.db``)."""
        return self.options.db_path

    async def connect(self, operator: str | None = "test operator") -> DaemonClient:
        """Return a connected client of this daemon's control socket."""
        return await DaemonClient.connect(
            self.options.socket_path, client="in-process test", operator=operator
        )

    async def operator(self, **options: Any) -> tuple[DaemonClient, AutoOperator]:
        """Return a connected client and the automatic operator on it, reading this bench."""
        assert self.bench is not None, "the automatic operator needs the bench"
        client = await self.connect(operator=ACTOR)
        return client, AutoOperator(client, self.bench.environment, **options)


@contextlib.asynccontextmanager
async def running(daemon: InProcessDaemon) -> AsyncIterator[InProcessDaemon]:
    """Run ``daemon`` on this loop until the block ends (or :meth:`InProcessDaemon.stop`),
    then stop it as SIGTERM would."""
    await daemon.start()
    try:
        yield daemon
    finally:
        await daemon.stop()


@contextlib.asynccontextmanager
async def session_daemon(
    directory: Path, *, real_s_per_step: float = 0.0, **options: Any
) -> AsyncIterator[InProcessDaemon]:
    """Run an :class:`InProcessDaemon` (``options``: its keywords) with time running."""
    async with running(InProcessDaemon(directory, **options)) as daemon:
        daemon.let_time_run(real_s_per_step)
        yield daemon


__all__ = [
    "QUICK_PLAN",
    "TIME_SCALE",
    "InProcessDaemon",
    "demo_metadata",
    "running",
    "session_daemon",
]
