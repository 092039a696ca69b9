"""Fixtures for the instrument layer: the real simulator process, started the way a user would.

``simulator(*options)`` runs ``python -m chargebook simulate ...`` as a subprocess,
reads its JSON announcement line, and returns a :class:`RunningSimulator` (paths, a control
client). Every simulator started is stopped (SIGTERM) at the end of the test, and its private
directory is checked to be gone.
"""

from __future__ import annotations

import contextlib
import json
import select
import signal
import subprocess
import sys
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest
from chargebook.drivers_generic import open_electrometer
from chargebook.drivers_generic.interface import Electrometer, Sample
from chargebook.drivers_generic.readout import capture_reading
from chargebook.drivers_generic.simulator.control import SimulatorControl

ANNOUNCE_TIMEOUT_s = 20.0
#: Fast simulated time: a 100 MU delivery at 600 MU/min takes 10 ms of wall time.
FAST = ("--time-scale", "0.001")
MU = 100.0


@dataclass
class RunningSimulator:
    """A `chargebook simulate` process and where to reach it."""

    process: subprocess.Popen
    info: dict[str, Any]
    control: SimulatorControl = field(init=False)

    def __post_init__(self) -> None:
        self.control = SimulatorControl(self.info["control"])

    @property
    def serial(self) -> str:
        return self.info["serial"]

    @property
    def scpi(self) -> str:
        return self.info["scpi"]

    def stop(self) -> int:
        self.control.close()
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
        try:
            return self.process.wait(timeout=10)
        finally:
            if self.process.poll() is None:
                self.process.kill()
            for stream in (self.process.stdout, self.process.stderr):
                if stream is not None:
                    stream.close()


def start_simulator(*options: str) -> RunningSimulator:
    """Start `chargebook simulate OPTIONS` and return it once it has announced itself."""
    command = [sys.executable, "-m", "chargebook", "simulate", *options]
    process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    ready, _, _ = select.select([process.stdout], [], [], ANNOUNCE_TIMEOUT_s)
    line = process.stdout.readline() if ready else ""
    if not line:
        process.kill()
        _, errors = process.communicate(timeout=10)
        raise RuntimeError(f"simulator did not announce itself: {errors}")
    return RunningSimulator(process, json.loads(line))


@pytest.fixture
def simulator() -> Iterator:
    """Return a factory that starts simulators; all are stopped after the test."""
    started: list[RunningSimulator] = []

    def factory(*options: str) -> RunningSimulator:
        running = start_simulator(*options)
        started.append(running)
        return running

    yield factory
    for running in started:
        directory = Path(running.info["control"]).parent
        assert running.stop() == 0
        assert not directory.exists(), "the simulator left its private directory behind"


def capture(driver, control, mu: float = MU) -> Sample:
    """Return one reading of ``mu`` MU, the beam delivered by the simulator's bench."""
    return capture_reading(driver, lambda wait: control.beam(mu, wait=wait), timeout_s=10.0)


@contextlib.contextmanager
def scpi_driver(simulator, *options: str) -> Iterator[tuple[RunningSimulator, Electrometer]]:
    """Start a simulator serving SCPI on a loopback socket (``options`` added, fast time) with
    the ``scpi-generic`` driver open on it; yield both, and close the driver after."""
    sim = simulator("--scpi", "0", *options, *FAST)
    driver = open_electrometer("scpi-generic", resource=sim.scpi)
    try:
        yield sim, driver
    finally:
        driver.close()
