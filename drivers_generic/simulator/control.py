"""The simulator's control socket: the treatment machine and the bench, as a Unix socket.

Newline-delimited JSON: one request ``{"op": ..., ...}`` per line, one reply per line,
``{"ok": true, ...}`` or ``{"ok": false, "error": "..."}``. A bad request gets an error reply
naming the field, the value and what is allowed; the connection stays usable.

Ops (see DEVELOPERS.md, "Simulated electrometer"):

``beam``         ``mu``, ``dose_rate_MU_per_min`` (600), ``wait`` (false): the linac delivers;
                 replies once the delivery has started (or ended, with ``wait``).
``bias``         ``volts``: the operator turned the bias switch (works whatever the profile says).
``environment``  get; or set ``temperature_C`` and/or ``pressure_kPa``.
``truth``        the true k_TP, k_pol, k_s (at each bias, plus any in ``biases_V``),
                 sensitivity and leakage.
``drop``         ``seconds``: the cable is pulled; the pty (and SCPI socket) come back after.
``flood``        ``rate_per_s`` (0 = as fast as possible), ``count``, ``wait`` (false).
``spike``        the next delivery carries a spike.
``state``        the instrument's state.

:class:`SimulatorControl` is the client.
"""

from __future__ import annotations

import json
import logging
import socket
import socketserver
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

from chargebook.drivers_generic.simulator.device import (
    SimulatorBusy,
    SimulatorInputError,
    check_number,
)

log = logging.getLogger("chargebook.simulator.control")

MAX_REQUEST_BYTES = 65536
#: How often the server thread checks for shutdown, in seconds (bounds the time to stop).
SHUTDOWN_POLL_s = 0.05
MAX_DROP_s = 3600.0
MAX_FLOOD_COUNT = 10_000_000
MAX_FLOOD_RATE_PER_s = 1e6

Handler = Callable[[dict[str, Any]], dict[str, Any]]


class SimulatorControlError(RuntimeError):
    """The simulator refused a control request; the message is its reason."""


class ControlServer:
    """Serves control requests on a Unix socket; ``ops`` maps an op name to its handler."""

    def __init__(self, path: Path, ops: dict[str, Handler]) -> None:
        self.path = Path(path)
        self.ops = ops
        server_self = self

        class _Connection(socketserver.StreamRequestHandler):
            def handle(self) -> None:
                server_self._serve_connection(self.rfile, self.wfile)

        self._server = socketserver.ThreadingUnixStreamServer(str(self.path), _Connection)
        self._server.daemon_threads = True
        self.path.chmod(0o600)
        self._thread = threading.Thread(
            target=self._server.serve_forever, args=(SHUTDOWN_POLL_s,), name="control", daemon=True
        )

    def start(self) -> None:
        """Start answering requests in a background thread."""
        self._thread.start()

    def stop(self) -> None:
        """Stop answering and remove the socket file."""
        if self._thread.is_alive():
            self._server.shutdown()
        self._server.server_close()
        self.path.unlink(missing_ok=True)

    def _serve_connection(self, rfile, wfile) -> None:
        while True:
            line = rfile.readline(MAX_REQUEST_BYTES + 1)
            if not line:
                return
            if len(line) > MAX_REQUEST_BYTES:
                wfile.write(_encode({"ok": False, "error": "request longer than 64 KiB"}))
                return
            if not line.strip():
                continue
            wfile.write(_encode(self.handle_line(line)))
            wfile.flush()

    def handle_line(self, line: bytes) -> dict[str, Any]:
        """Return the reply to one request line."""
        try:
            request = json.loads(line)
        except (json.JSONDecodeError, UnicodeDecodeError) as error:
            return {"ok": False, "error": f"request is not valid JSON: {error}"}
        if not isinstance(request, dict):
            return {"ok": False, "error": "request must be a JSON object with an 'op'"}
        op = request.get("op")
        handler = self.ops.get(op) if isinstance(op, str) else None
        if handler is None:
            return {
                "ok": False,
                "error": f"op = {op!r} is not allowed; allowed: {', '.join(sorted(self.ops))}",
            }
        try:
            return {"ok": True, **handler(request)}
        except (SimulatorInputError, SimulatorBusy, SimulatorControlError) as error:
            return {"ok": False, "error": str(error)}
        except Exception as error:  # a fault in one request must not take the bench down
            log.exception("control op %s failed", op)
            return {"ok": False, "error": f"{type(error).__name__}: {error}"}


def _encode(reply: dict[str, Any]) -> bytes:
    return (json.dumps(reply) + "\n").encode("utf-8")


def drop_seconds(request: dict[str, Any]) -> float:
    """Return the ``seconds`` of a drop request, checked."""
    return check_number("seconds", request.get("seconds", 1.0), 0.0, MAX_DROP_s, "s")


def flood_arguments(request: dict[str, Any]) -> tuple[float, int]:
    """Return (rate_per_s, count) of a flood request, checked."""
    rate = check_number("rate_per_s", request.get("rate_per_s", 0), 0, MAX_FLOOD_RATE_PER_s)
    count = request.get("count")
    if isinstance(count, bool) or not isinstance(count, int) or not 1 <= count <= MAX_FLOOD_COUNT:
        raise SimulatorInputError("count", count, f"a whole number from 1 to {MAX_FLOOD_COUNT}")
    return rate, count


class SimulatorControl:
    """Client of the simulator's control socket (one connection, thread-safe, re-connecting)."""

    def __init__(self, path: str | Path, *, timeout_s: float = 30.0) -> None:
        self.path = str(path)
        self.timeout_s = timeout_s
        self._lock = threading.Lock()
        self._socket: socket.socket | None = None
        self._reader: Any = None

    def request(self, op: str, **fields: Any) -> dict[str, Any]:
        """Send one request; return the reply, or raise SimulatorControlError if refused."""
        payload = (json.dumps({"op": op, **fields}) + "\n").encode("utf-8")
        with self._lock:
            for attempt in (1, 2):
                try:
                    self._connect()
                    self._socket.sendall(payload)
                    line = self._reader.readline(MAX_REQUEST_BYTES + 1)
                    if not line:
                        raise ConnectionResetError("control socket closed")
                    break
                except OSError:
                    self._disconnect()
                    if attempt == 2:
                        raise
        reply = json.loads(line)
        if not reply.get("ok"):
            raise SimulatorControlError(reply.get("error", "refused"))
        return reply

    def _connect(self) -> None:
        if self._socket is None:
            sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
            sock.settimeout(self.timeout_s)
            sock.connect(self.path)
            self._socket, self._reader = sock, sock.makefile("rb")

    def _disconnect(self) -> None:
        if self._socket is not None:
            self._reader.close()
            self._socket.close()
        self._socket = self._reader = None

    def close(self) -> None:
        """Close the connection."""
        with self._lock:
            self._disconnect()

    def __enter__(self) -> SimulatorControl:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- the ops -------------------------------------------------------------------------------
    def beam(
        self, mu: float, dose_rate_MU_per_min: float = 600.0, *, wait: bool = False
    ) -> dict[str, Any]:
        """Deliver ``mu`` MU; return once it started (or ended, with ``wait``)."""
        return self.request("beam", mu=mu, dose_rate_MU_per_min=dose_rate_MU_per_min, wait=wait)

    def bias(self, volts: float) -> dict[str, Any]:
        """Turn the bias switch to ``volts`` (signed) by hand."""
        return self.request("bias", volts=volts)

    def environment(self) -> dict[str, Any]:
        """Return the bench's temperature_C and pressure_kPa."""
        return self.request("environment")

    def set_environment(
        self, temperature_C: float | None = None, pressure_kPa: float | None = None
    ) -> dict[str, Any]:
        """Change the air temperature (°C) and/or pressure (kPa); return both."""
        fields = {"temperature_C": temperature_C, "pressure_kPa": pressure_kPa}
        return self.request("environment", **{k: v for k, v in fields.items() if v is not None})

    def truth(self, biases_V: list[float] | None = None) -> dict[str, Any]:
        """Return the true factors the simulated chamber uses."""
        return self.request("truth", **({"biases_V": biases_V} if biases_V else {}))

    def drop(self, seconds: float) -> dict[str, Any]:
        """Pull the cable for ``seconds``."""
        return self.request("drop", seconds=seconds)

    def flood(self, rate_per_s: float, count: int, *, wait: bool = False) -> dict[str, Any]:
        """Push ``count`` reading lines at ``rate_per_s`` (0: as fast as the port takes them)."""
        return self.request("flood", rate_per_s=rate_per_s, count=count, wait=wait)

    def spike(self) -> dict[str, Any]:
        """Make the next delivery carry a spike."""
        return self.request("spike")

    def state(self) -> dict[str, Any]:
        """Return the simulated instrument's state."""
        return self.request("state")
