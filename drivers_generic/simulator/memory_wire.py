"""The simulated electrometer's dialect on an in-memory wire: a transport with no port at all.

:class:`MemoryWire` is a :class:`~chargebook.drivers_generic.transport.Transport` whose far end
is a responder (a :class:`~.dialect.DialectResponder` on a :class:`~.device.SimulatedElectrometer`)
in this process: every line written is answered at once through ``respond``, and a read takes
whatever the instrument sends unasked (``tick``: streamed readings, the end-of-beam line). The
driver above it is the real :class:`~chargebook.drivers_generic.driver.ProfileElectrometer`, with
the transport base's framing, traffic records and line limits; only the pty or socket is gone.

With a :class:`~.hand_clock.HandClock` as ``clock`` and its ``pause`` as ``pause``, the device,
the wire and the driver share one instrument time that moves only when told, so a test decides
when the beam ends and when the cable is pulled (:meth:`unplug`, :meth:`plug`), never a timer.
The real wires (pty, SCPI socket) keep their own tests; this one proves the logic above them.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass

from chargebook.drivers_generic.driver import ProfileElectrometer
from chargebook.drivers_generic.interface import InstrumentDisconnected, TrafficListener
from chargebook.drivers_generic.profile import Framing, Profile, load_profile
from chargebook.drivers_generic.simulator.device import SimulatedElectrometer
from chargebook.drivers_generic.simulator.dialect import DialectResponder, Responder
from chargebook.drivers_generic.simulator.physics import ChamberParameters, ChamberPhysics
from chargebook.drivers_generic.transport import Transport


class MemoryWire(Transport):
    """A transport to a responder in this process (thread-safe: the bench may unplug it)."""

    def __init__(
        self,
        responder: Responder,
        framing: Framing,
        *,
        traffic: TrafficListener | None = None,
        clock: Callable[[], float] = time.monotonic,
        pause: Callable[[float], None] = time.sleep,
    ) -> None:
        super().__init__(framing, traffic=traffic, clock=clock, name="memory wire")
        self.responder = responder
        self.pause = pause
        self._lock = threading.Lock()
        self._incoming = bytearray()
        self._command = bytearray()
        self._plugged = True
        #: The instrument time of the latest exchange (a write answered or a read served).
        self.served_at_s: float | None = None

    # -- the cable -----------------------------------------------------------------------------
    def unplug(self) -> None:
        """Pull the cable: what was in flight is lost, reads and writes raise
        InstrumentDisconnected, and the port cannot be opened until :meth:`plug`."""
        with self._lock:
            self._plugged = False
            self._incoming.clear()
            self._command.clear()

    def plug(self) -> None:
        """Put the cable back: the port can be opened again."""
        with self._lock:
            self._plugged = True

    @property
    def plugged(self) -> bool:
        """Return True while the cable is in."""
        return self._plugged

    # -- Transport -----------------------------------------------------------------------------
    def _open(self) -> None:
        if not self._plugged:
            raise InstrumentDisconnected("the simulated electrometer's cable is unplugged")

    def _close(self) -> None:
        pass

    def _write(self, data: bytes) -> None:
        terminator = self.framing.write_terminator
        with self._lock:
            self._check_plugged()
            self._command += data
            while (end := self._command.find(terminator)) >= 0:
                line = bytes(self._command[:end]).decode(self.framing.encoding, errors="replace")
                del self._command[: end + len(terminator)]
                self._queue(self.responder.respond(line))
            self.served_at_s = self.clock()

    def _read_available(self, timeout_s: float) -> bytes:
        data = self._take()
        if not data and timeout_s > 0:
            self.pause(timeout_s)
            data = self._take()
        return data

    def _take(self) -> bytes:
        with self._lock:
            self._check_plugged()
            self._queue(self.responder.tick())
            data = bytes(self._incoming)
            self._incoming.clear()
            self.served_at_s = self.clock()
            return data

    def _queue(self, lines: list[str]) -> None:
        terminator = self.framing.read_terminator
        for line in lines:
            self._incoming += line.encode(self.framing.encoding, errors="surrogateescape")
            self._incoming += terminator

    def _check_plugged(self) -> None:
        if not self._plugged:
            raise InstrumentDisconnected("the simulated electrometer's cable was pulled")


@dataclass
class InProcessElectrometer:
    """A simulated electrometer in this process: the ``device`` (its bench side: ``beam``,
    ``set_bias``, ``truth``), the ``wire`` (``unplug``, ``plug``) and the real ``driver`` on it."""

    device: SimulatedElectrometer
    wire: MemoryWire
    driver: ProfileElectrometer


def in_process_electrometer(
    profile: str | Profile,
    *,
    seed: int = 1,
    time_scale: float = 1.0,
    clock: Callable[[], float] = time.monotonic,
    pause: Callable[[float], None] = time.sleep,
    traffic: TrafficListener | None = None,
    beam: str = "pulsed",
) -> InProcessElectrometer:
    """Return the simulated chamber and electrometer of ``seed`` speaking ``profile``'s serial
    dialect on a :class:`MemoryWire`, with the driver built (not opened) on the same clock."""
    loaded = profile if isinstance(profile, Profile) else load_profile(profile)
    physics = ChamberPhysics(ChamberParameters(beam=beam), seed)
    device = SimulatedElectrometer(physics, time_scale=time_scale, clock=clock, sleep=pause)
    responder = DialectResponder(loaded, device)
    wire = MemoryWire(responder, loaded.framing, traffic=traffic, clock=clock, pause=pause)
    return InProcessElectrometer(device, wire, ProfileElectrometer(loaded, wire, clock=clock))
