"""The simulated electrometer process: wires the device to its pty, SCPI socket and control socket.

:func:`run_simulator` is what ``chargebook simulate`` runs. It prints one JSON line on stdout
(``serial``, ``scpi``, ``control``, ``profile``, ``pid``), then logs to stderr and serves until
SIGTERM or SIGINT, and removes its private directory on the way out.
"""

from __future__ import annotations

import json
import logging
import shutil
import signal
import sys
import tempfile
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from chargebook.drivers_generic.profile import load_profile
from chargebook.drivers_generic.simulator.control import (
    ControlServer,
    SimulatorControlError,
    drop_seconds,
    flood_arguments,
)
from chargebook.drivers_generic.simulator.device import (
    SimulatedElectrometer,
    SimulatorInputError,
    check_number,
)
from chargebook.drivers_generic.simulator.dialect import DialectResponder, Responder
from chargebook.drivers_generic.simulator.physics import (
    BEAM_KINDS,
    ChamberParameters,
    ChamberPhysics,
)

log = logging.getLogger("chargebook.simulator")


@dataclass(frozen=True)
class SimulatorOptions:
    """Everything ``chargebook simulate`` was asked for (units in names)."""

    serial: bool = True
    scpi_port: int | None = None
    profile: str = "query-plain"
    seed: int = 1
    time_scale: float = 1.0
    temperature_C: float = 21.5
    pressure_kPa: float = 100.8
    beam: str = "pulsed"
    bias_V: float = 300.0
    playback: Path | None = None
    speed: float = 1.0
    directory: Path | None = None

    def check(self) -> None:
        """Raise SimulatorInputError naming the first option outside what is allowed."""
        check_number("--scpi", self.scpi_port if self.scpi_port is not None else 0, 0, 65535)
        check_number("--time-scale", self.time_scale, 1e-6, 1e3)
        check_number("--speed", self.speed, 0, 1e9)
        if self.beam not in BEAM_KINDS:
            raise SimulatorInputError("--beam", self.beam, ", ".join(BEAM_KINDS))
        if self.playback is not None and not Path(self.playback).is_file():
            raise SimulatorInputError("--playback", str(self.playback), "an existing log file")


#: The simulated thermometer-barometer's dialect.
SENSOR_PROFILE = "sensor-plain"


class Simulator:
    """The running simulated electrometer with all its wires (pty, SCPI socket, control)."""

    def __init__(self, options: SimulatorOptions) -> None:
        options.check()
        self.options = options
        self.profile = load_profile(options.profile)
        physics = ChamberPhysics(ChamberParameters(beam=options.beam), options.seed)
        self.device = SimulatedElectrometer(
            physics,
            time_scale=options.time_scale,
            temperature_C=options.temperature_C,
            pressure_kPa=options.pressure_kPa,
            bias_V=options.bias_V,
        )
        self._playback_entries = self._read_playback_log()
        self.directory = Path(options.directory or tempfile.mkdtemp(prefix="chargebook-sim-"))
        self.directory.chmod(0o700)
        self.pty = None
        self.sensor_pty = None
        self.scpi = None
        self.control = ControlServer(self.directory / "control.sock", self._ops())

    def _responder(self, dialect: str) -> Responder:
        if self.options.playback is not None:
            from chargebook.drivers_generic.simulator.playback import PlaybackResponder

            mode = "query" if dialect == "scpi" else self.profile.mode
            return PlaybackResponder(self._playback_entries, mode, self.options.speed)
        if dialect == "scpi" or self.profile.confirmation.style == "error_queue":
            from chargebook.drivers_generic.simulator.scpi_server import ScpiResponder

            return ScpiResponder(self.device)
        return DialectResponder(self.profile, self.device)

    def _read_playback_log(self) -> list[tuple[float, str, str]]:
        if self.options.playback is None:
            return []
        from chargebook.drivers_generic.simulator.playback import read_log

        return read_log(self.options.playback)

    def start(self) -> dict[str, Any]:
        """Open every wire; return the JSON-able announcement."""
        if self.options.serial:
            from chargebook.drivers_generic.simulator.serial_server import PtyServer

            self.pty = PtyServer(
                self._responder("serial"), self.profile.framing, self.directory / "electrometer"
            )
            self.pty.start()
            self.sensor_pty = self._sensor_wire()
        if self.options.scpi_port is not None:
            from chargebook.drivers_generic.simulator.scpi_server import ScpiServer

            self.scpi = ScpiServer(self._responder("scpi"), self.options.scpi_port)
            self.scpi.start()
        self.control.start()
        return self.announcement()

    def _sensor_wire(self) -> Any:
        """Open the simulated thermometer-barometer on a pty of its own (``sensor``)."""
        from chargebook.drivers_generic.sensor import load_sensor_profile
        from chargebook.drivers_generic.simulator.sensor_dialect import SensorResponder
        from chargebook.drivers_generic.simulator.serial_server import PtyServer

        profile = load_sensor_profile(SENSOR_PROFILE)
        wire = PtyServer(
            SensorResponder(profile, self.device), profile.framing, self.directory / "sensor"
        )
        wire.start()
        return wire

    def announcement(self) -> dict[str, Any]:
        """Return the line printed on stdout: where each wire is."""
        import os

        return {
            "serial": str(self.pty.link_path) if self.pty else None,
            "scpi": f"TCPIP::127.0.0.1::{self.scpi.port}::SOCKET" if self.scpi else None,
            "control": str(self.control.path),
            "profile": self.profile.name,
            "pid": os.getpid(),
            "sensor": str(self.sensor_pty.link_path) if self.sensor_pty else None,
            "sensor_profile": SENSOR_PROFILE if self.sensor_pty else None,
        }

    def stop(self) -> None:
        """Close every wire and remove the private directory."""
        self.control.stop()
        if self.pty is not None:
            self.pty.stop()
        if self.sensor_pty is not None:
            self.sensor_pty.stop()
        if self.scpi is not None:
            self.scpi.stop()
        shutil.rmtree(self.directory, ignore_errors=True)

    # -- control ops ---------------------------------------------------------------------------
    def _ops(self) -> dict[str, Any]:
        return {
            "beam": self._beam,
            "bias": lambda r: {"bias_V": self.device.set_bias(r.get("volts"))},
            "environment": self._environment,
            "truth": lambda r: self.device.truth(_biases(r.get("biases_V"))),
            "drop": self._drop,
            "flood": self._flood,
            "spike": lambda r: (self.device.set_spike(), {"spike_pending": True})[1],
            "state": self._state,
        }

    def _beam(self, request: dict[str, Any]) -> dict[str, Any]:
        self._refuse_in_playback("beam")
        started = self.device.beam(request.get("mu"), request.get("dose_rate_MU_per_min", 600.0))
        if request.get("wait"):
            self.device.wait_for_beam()
        return {**started, "beam_on": self.device.beam_on()}

    def _environment(self, request: dict[str, Any]) -> dict[str, Any]:
        return self.device.set_environment(
            request.get("temperature_C"), request.get("pressure_kPa")
        )

    def _drop(self, request: dict[str, Any]) -> dict[str, Any]:
        seconds = drop_seconds(request)
        if self.pty is None and self.scpi is None:
            raise SimulatorControlError("nothing to drop: no serial or SCPI wire is open")
        if self.pty is not None:
            self.pty.drop(seconds)
        if self.scpi is not None:
            self.scpi.drop(seconds)
        return {"seconds": seconds}

    def _flood(self, request: dict[str, Any]) -> dict[str, Any]:
        self._refuse_in_playback("flood")
        rate, count = flood_arguments(request)
        if self.pty is None:
            raise SimulatorControlError("flood needs the serial wire (start with --serial)")
        self.pty.flood(rate, count)
        written = self.pty.wait_flood() if request.get("wait") else None
        return {"rate_per_s": rate, "count": count, "written": written}

    def _state(self, request: dict[str, Any]) -> dict[str, Any]:
        state = self.device.state()
        state["profile"] = self.profile.name
        state["serial_connected"] = self.pty.connected if self.pty else None
        state["playback"] = str(self.options.playback) if self.options.playback else None
        return state

    def _refuse_in_playback(self, op: str) -> None:
        if self.options.playback is not None:
            raise SimulatorControlError(f"{op} is not available in playback mode")


def _biases(value: object) -> list[float] | None:
    if value is None:
        return None
    if not isinstance(value, list) or not all(
        isinstance(v, int | float) and not isinstance(v, bool) and 0 < abs(v) <= 1000 for v in value
    ):
        raise SimulatorControlError(
            f"biases_V = {value!r} is not allowed; allowed: a list of volts, 0 < |V| <= 1000"
        )
    return [abs(float(v)) for v in value]


def run_simulator(options: SimulatorOptions) -> int:
    """Run the simulated electrometer until SIGTERM/SIGINT; return the exit status."""
    logging.basicConfig(
        level=logging.INFO, stream=sys.stderr, format="%(asctime)s %(name)s %(message)s"
    )
    stop = threading.Event()
    for signum in (signal.SIGTERM, signal.SIGINT):
        signal.signal(signum, lambda *_: stop.set())
    simulator = Simulator(options)
    try:
        announcement = simulator.start()
        sys.stdout.write(json.dumps(announcement) + "\n")
        sys.stdout.flush()
        while not stop.wait(0.1):
            pass
    finally:
        simulator.stop()
    log.info("simulator stopped")
    return 0
