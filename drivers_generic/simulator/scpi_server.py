"""The simulated instrument speaking SCPI, on a loopback TCP socket (or on the pty).

:class:`ScpiResponder` is a small SCPI instrument: IEEE 488.2 common commands (``*IDN?``,
``*RST``, ``*CLS``, ``*OPC?``), an error queue read with ``SYST:ERR?`` holding IEEE 488.2 style
entries such as ``-113,"Undefined header"``, and ``INIT``, ``ABOR``, ``FETC?``, ``READ?``,
``CHAR:CLE``, ``CHAR:RANG``, ``SOUR:VOLT``, ``OUTP``. Headers are case-insensitive and accept long
forms (``SYSTem:ERRor?``); several commands may share a line, separated by ``;``. Setting
commands answer nothing: errors go to the queue. Charge is answered in coulombs; an overrange
charge is answered as 9.9E37, SCPI's overrange value. In this instrument ``READ?`` answers the
integrated charge like ``FETC?`` without stopping the integrator.

:class:`ScpiServer` serves a responder on 127.0.0.1, one thread per connection.
"""

from __future__ import annotations

import contextlib
import logging
import math
import socket
import socketserver
import threading
import time
from collections import deque

from chargebook.drivers_generic.simulator.control import SHUTDOWN_POLL_s
from chargebook.drivers_generic.simulator.device import (
    RANGES,
    SimulatedElectrometer,
    SimulatorInputError,
)
from chargebook.drivers_generic.simulator.dialect import (
    DEFAULT_SERIAL_NUMBER,
    SIMULATOR_FIRMWARE,
    SIMULATOR_MANUFACTURER,
)

log = logging.getLogger("chargebook.simulator.scpi")

SCPI_OVERRANGE = 9.9e37
ERROR_QUEUE_LENGTH = 16
MAX_LINE_BYTES = 4096
NO_ERROR = '0,"No error"'

#: IEEE 488.2 / SCPI error entries the simulated instrument can report.
UNDEFINED_HEADER = '-113,"Undefined header"'
DATA_TYPE_ERROR = '-104,"Data type error"'
ILLEGAL_PARAMETER = '-224,"Illegal parameter value"'
DATA_OUT_OF_RANGE = '-222,"Data out of range"'
QUEUE_OVERFLOW = '-350,"Queue overflow"'

_LONG_FORMS = {
    "SYSTEM": "SYST",
    "ERROR": "ERR",
    "FETCH": "FETC",
    "INITIATE": "INIT",
    "ABORT": "ABOR",
    "SOURCE": "SOUR",
    "VOLTAGE": "VOLT",
    "OUTPUT": "OUTP",
    "CHARGE": "CHAR",
    "CLEAR": "CLE",
    "RANGE": "RANG",
}
_RANGE_WORDS = ("LOW", "HIGH")


def short_header(header: str) -> str:
    """Return a SCPI header in upper-case short form: ``syst:error?`` -> ``SYST:ERR?``."""
    query = header.endswith("?")
    parts = header.rstrip("?").upper().lstrip(":").split(":")
    short = ":".join(_LONG_FORMS.get(part, part) for part in parts)
    return short + ("?" if query else "")


class ScpiResponder:
    """A small SCPI instrument in front of the simulated electrometer."""

    def __init__(
        self, device: SimulatedElectrometer, *, serial_number: str = DEFAULT_SERIAL_NUMBER
    ) -> None:
        self.device = device
        self.serial_number = serial_number
        self.errors: deque[str] = deque()
        self.output_on = device.bias_V != 0
        self.programmed_V = device.bias_V if device.bias_V != 0 else 300.0
        self._lock = threading.Lock()
        self._handlers = {
            "*IDN?": self._identify,
            "*RST": self._reset,
            "*CLS": lambda arg: self.errors.clear(),
            "*OPC?": lambda arg: "1",
            "SYST:ERR?": self._next_error,
            "SYST:ERR:NEXT?": self._next_error,
            "INIT": lambda arg: self.device.start(),
            "ABOR": lambda arg: self.device.stop(),
            "FETC?": self._charge,
            "READ?": self._charge,
            "CHAR:CLE": lambda arg: self.device.zero(),
            "CHAR:RANG": self._set_range,
            "CHAR:RANG?": lambda arg: _RANGE_WORDS[self.device.range_index],
            "SOUR:VOLT": self._set_voltage,
            "SOUR:VOLT?": lambda arg: f"{self.programmed_V:+.6E}",
            "OUTP": self._set_output,
            "OUTP?": lambda arg: "1" if self.output_on else "0",
        }

    def respond(self, line: str) -> list[str]:
        """Return the answers to the queries on one line; errors go to the queue."""
        answers = []
        with self._lock:
            for command in filter(None, (part.strip() for part in line.split(";"))):
                header, _, argument = command.partition(" ")
                handler = self._handlers.get(short_header(header))
                if handler is None:
                    self._push_error(UNDEFINED_HEADER)
                    continue
                answer = handler(argument.strip())
                if isinstance(answer, str):
                    answers.append(answer)
        return answers

    def tick(self) -> list[str]:
        """Return nothing: a SCPI instrument speaks only when asked."""
        return []

    def tick_interval_s(self) -> float:
        """Return how often the server should call :meth:`tick`, in seconds."""
        return 0.05

    def flood_line(self, index: int) -> str:
        """Return one charge answer for a flood."""
        return self._charge("")

    def _push_error(self, entry: str) -> None:
        if len(self.errors) >= ERROR_QUEUE_LENGTH - 1:
            if self.errors[-1] != QUEUE_OVERFLOW:
                self.errors.append(QUEUE_OVERFLOW)
            return
        self.errors.append(entry)

    def _next_error(self, argument: str) -> str:
        return self.errors.popleft() if self.errors else NO_ERROR

    def _identify(self, argument: str) -> str:
        return f"{SIMULATOR_MANUFACTURER},SIM-SCPI,{self.serial_number},{SIMULATOR_FIRMWARE}"

    def _reset(self, argument: str) -> None:
        self.device.stop()
        self.device.zero()
        self.device.set_range(len(RANGES) - 1)

    def _charge(self, argument: str) -> str:
        charge_nC, status = self.device.read()
        if status == "overrange":
            return f"{math.copysign(SCPI_OVERRANGE, charge_nC):+.6E}"
        return f"{charge_nC * 1e-9:+.6E}"

    def _set_range(self, argument: str) -> None:
        word = argument.upper()
        if word not in _RANGE_WORDS:
            self._push_error(ILLEGAL_PARAMETER)
            return
        self.device.set_range(min(_RANGE_WORDS.index(word), len(RANGES) - 1))

    def _set_voltage(self, argument: str) -> None:
        try:
            volts = float(argument)
        except ValueError:
            self._push_error(DATA_TYPE_ERROR)
            return
        if not math.isfinite(volts) or abs(volts) > 1000:
            self._push_error(DATA_OUT_OF_RANGE)
            return
        self.programmed_V = volts
        if self.output_on:
            self.device.set_bias(volts)

    def _set_output(self, argument: str) -> None:
        word = argument.upper()
        if word not in ("ON", "OFF", "1", "0"):
            self._push_error(ILLEGAL_PARAMETER)
            return
        self.output_on = word in ("ON", "1")
        try:
            self.device.set_bias(self.programmed_V if self.output_on else 0.0)
        except SimulatorInputError:
            self._push_error(DATA_OUT_OF_RANGE)


class _LoopbackServer(socketserver.ThreadingTCPServer):
    allow_reuse_address = True
    daemon_threads = True


class ScpiServer:
    """Serves a responder on 127.0.0.1:``port`` (0 picks a free port); can drop its clients."""

    def __init__(self, responder, port: int) -> None:
        self.responder = responder
        self.port = port
        self._server: _LoopbackServer | None = None
        self._connections: set[socket.socket] = set()
        self._lock = threading.Lock()
        self._reopen_timer: threading.Timer | None = None

    def start(self) -> None:
        """Listen on 127.0.0.1 and serve in a background thread."""
        server_self = self

        class _Connection(socketserver.StreamRequestHandler):
            def handle(self) -> None:
                server_self._serve(self.request, self.rfile, self.wfile)

        server = _LoopbackServer(("127.0.0.1", self.port), _Connection)
        self.port = server.server_address[1]
        self._server = server
        threading.Thread(
            target=server.serve_forever, args=(SHUTDOWN_POLL_s,), name="scpi", daemon=True
        ).start()
        log.info("SCPI on 127.0.0.1:%d", self.port)

    def stop(self) -> None:
        """Stop listening and close every client connection."""
        if self._reopen_timer is not None:
            self._reopen_timer.cancel()
        server, self._server = self._server, None
        if server is not None:
            server.shutdown()
            server.server_close()
        with self._lock:
            for connection in self._connections:
                with contextlib.suppress(OSError):
                    connection.shutdown(socket.SHUT_RDWR)
            self._connections.clear()

    def drop(self, seconds: float) -> None:
        """Close the listener and every client now; listen again after ``seconds``."""
        self.stop()
        self._reopen_timer = threading.Timer(seconds, self._reopen)
        self._reopen_timer.daemon = True
        self._reopen_timer.start()

    def _reopen(self) -> None:
        for _ in range(50):
            try:
                self.start()
                return
            except OSError:  # the port may linger a moment after the drop
                time.sleep(0.1)
        log.error("could not listen again on port %d", self.port)

    def _serve(self, connection: socket.socket, rfile, wfile) -> None:
        with self._lock:
            self._connections.add(connection)
        connection.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        try:
            while True:
                raw = rfile.readline(MAX_LINE_BYTES)
                if not raw:
                    return
                line = raw.decode("ascii", errors="replace").strip("\r\n")
                answers = self.responder.respond(line)
                if answers:
                    text = "".join(answer + "\n" for answer in answers)
                    wfile.write(text.encode("utf-8", errors="surrogateescape"))
                    wfile.flush()
        except OSError:
            return
        finally:
            with self._lock:
                self._connections.discard(connection)
