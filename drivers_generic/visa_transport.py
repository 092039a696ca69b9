"""Lines over a VISA resource, by default with pyvisa's pure-Python backend (``@py``).

Resources such as ``TCPIP::127.0.0.1::5025::SOCKET`` or ``ASRL/dev/ttyUSB0::INSTR``. pyvisa is
imported when the resource is opened. The VISA library is ``--visa-library`` (``@py``, ``@ivi``
or a vendor library's path), else ``$PYVISA_LIBRARY``, else ``@py``. ASRL resources get the
profile's serial settings, flow control included. Bytes go through pyvisa's low-level calls
(``visalib.read`` and ``visalib.write``: viRead, viWrite), which the resource's ``read_raw`` and
``write_raw`` wrap in layers of their own; a line is framed here, once, as on every wire.

pyvisa-py reports a peer that closed a socket as a plain timeout, so after a timeout the socket
is checked, and a closed peer becomes InstrumentDisconnected rather than an endless run of
timeouts. Before a command, lines already waiting (late answers, in the socket or in the bytes
pyvisa-py read past its last line) are reported, so the driver sets them aside as it does on a
serial port. The socket and those bytes are found through pyvisa-py internals that are not its
public interface (:data:`PYVISA_PY_INTERNALS`); tests/drivers_generic/test_visa_internals.py
fails loudly when a pyvisa-py release changes them. With another VISA library there is no such
socket, and a closed peer shows as timeouts until the driver counts the instrument lost.
"""

from __future__ import annotations

import contextlib
import os
import select
import socket
import time
from collections.abc import Callable
from typing import Any

from chargebook.drivers_generic.interface import InstrumentDisconnected, TrafficListener
from chargebook.drivers_generic.profile import Framing, PortSettings
from chargebook.drivers_generic.transport import Transport

_PARITY_NAMES = {"N": "none", "E": "even", "O": "odd", "M": "mark", "S": "space"}
_STOPBITS_NAMES = {1: "one", 1.5: "one_and_a_half", 2: "two"}
_PEEK_WITHOUT_WAITING = int(socket.MSG_PEEK | socket.MSG_DONTWAIT)
#: What poll is asked to report on the socket: bytes, urgent data, and on Linux the far end's
#: close (POLLRDHUP); errors and hang-ups are always reported. Without poll, every look peeks.
_POLL_EVENTS = (
    select.POLLIN | select.POLLPRI | getattr(select, "POLLRDHUP", 0)
    if hasattr(select, "poll")
    else 0
)
#: Bytes waiting and nothing else: where POLLRDHUP exists, the far end is still there.
_ONLY_BYTES = select.POLLIN if getattr(select, "POLLRDHUP", 0) else -1
#: The profile's flow control, by pyvisa's ControlFlow name (dsrdtr: VISA's dtr_dsr).
_FLOW_CONTROL_NAMES = {
    "none": "none",
    "xonxoff": "xon_xoff",
    "rtscts": "rts_cts",
    "dsrdtr": "dtr_dsr",
}
#: The attribute paths into pyvisa-py this module relies on, not part of its public interface:
#: ``resource.visalib.sessions`` (session number -> session object) and that session's
#: ``interface`` (the socket.socket of a TCPIP SOCKET resource; a serial.Serial for ASRL).
#: Also, for a TCPIP SOCKET session, its ``_pending_buffer``: the bytes it received past the
#: line it returned (a bytearray, replaced by each read), which only it can see.
PYVISA_PY_INTERNALS = (
    "visalib.sessions",
    "sessions[session].interface",
    "sessions[session]._pending_buffer",
)
DEFAULT_VISA_LIBRARY = "@py"
#: The least time a command is given to leave, ms. VISA has one timeout for reads and writes,
#: and a read that only looks for waiting lines sets it to 1 ms: a write under that timeout
#: fails on a busy machine, and a failed write counts as the instrument gone.
WRITE_TIMEOUT_MS = 1000


def visa_library_spec(explicit: str | None = None, environ: dict[str, str] | None = None) -> str:
    """Return the VISA library to open: ``explicit``, else ``$PYVISA_LIBRARY``, else ``@py``."""
    env = os.environ if environ is None else environ
    return explicit or env.get("PYVISA_LIBRARY") or DEFAULT_VISA_LIBRARY


def pyvisa_py_session(resource: Any) -> Any:
    """Return pyvisa-py's session object for an open ``resource``, or None when the library is
    not pyvisa-py or its internals differ."""
    sessions = getattr(resource.visalib, "sessions", None)
    return sessions.get(resource.session) if isinstance(sessions, dict) else None


def pyvisa_py_interface(resource: Any) -> Any:
    """Return the object pyvisa-py talks through for an open ``resource`` (a socket, a serial
    port), or None when the library is not pyvisa-py or its internals differ."""
    return getattr(pyvisa_py_session(resource), "interface", None)


class VisaTransport(Transport):
    """Lines over a pyvisa ``@py`` resource; the serial settings apply to ASRL resources."""

    def __init__(
        self,
        resource: str,
        framing: Framing,
        *,
        settings: PortSettings | None = None,
        open_timeout_s: float = 2.0,
        visa_library: str | None = None,
        traffic: TrafficListener | None = None,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        """``visa_library``: see :func:`visa_library_spec`."""
        super().__init__(framing, traffic=traffic, clock=clock, name=resource)
        self.resource = resource
        self.visa_library = visa_library_spec(visa_library)
        self.settings = settings
        self.open_timeout_s = open_timeout_s
        self._manager: Any = None
        self._instrument: Any = None
        #: pyvisa's low-level library and the session number: reads and writes go straight to
        #: them (viRead, viWrite), as the resource's read_raw and write_raw do under their layers
        self._visalib: Any = None
        self._session: Any = None
        self._chunk_bytes = 0
        self._quiet = contextlib.ExitStack()  # the warnings ignored while open, as read_raw does
        self._sock: socket.socket | None = None  # the TCP socket under a SOCKET resource
        self._poll: Any = None  # select.poll on that socket, where the system has poll
        self._visa_session: Any = None  # pyvisa-py's session when it holds a _pending_buffer
        self._timeout_ms: float | None = None

    def _open(self) -> None:
        import pyvisa
        from pyvisa.constants import StatusCode

        try:
            if self._manager is None:
                self._manager = pyvisa.ResourceManager(self.visa_library)
            instrument = self._manager.open_resource(
                self.resource, open_timeout=int(self.open_timeout_s * 1000)
            )
        except Exception as error:  # pyvisa-py raises bare Exception when a socket is refused
            raise InstrumentDisconnected(
                f"cannot open VISA resource {self.resource}: {error}"
            ) from None
        self._instrument = instrument
        self._visalib, self._session = instrument.visalib, instrument.session
        self._chunk_bytes = instrument.chunk_size
        # a chunk read whole, or a device that does not say it is there, is no error
        self._quiet.enter_context(
            instrument.ignore_warning(
                StatusCode.success_device_not_present,
                StatusCode.success_max_count_read,
            )
        )
        self._sock = self._socket()
        self._poll = self._visa_session = None
        if self._sock is not None:
            session = pyvisa_py_session(instrument)
            if isinstance(getattr(session, "_pending_buffer", None), bytearray):
                self._visa_session = session
        if self._sock is not None and _POLL_EVENTS:
            self._poll = select.poll()
            self._poll.register(self._sock, _POLL_EVENTS)
        self._timeout_ms = None
        instrument.read_termination = self.framing.read_terminator[-1:].decode("latin-1")
        instrument.write_termination = ""
        if self.settings is not None and self.resource.upper().startswith("ASRL"):
            self._apply_serial_settings(instrument)
        if self._peer_closed():
            self._close()
            raise InstrumentDisconnected(f"VISA resource {self.resource} refused the connection")
        if self._sock is not None:  # a command and its SYST:ERR? must not wait for Nagle
            self._sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)

    @property
    def interface(self) -> Any:
        """The object pyvisa-py talks through while open (a socket, a serial port), or None."""
        return None if self._instrument is None else pyvisa_py_interface(self._instrument)

    def _apply_serial_settings(self, instrument: Any) -> None:
        from pyvisa import constants

        settings = self.settings
        instrument.baud_rate = settings.baud
        instrument.data_bits = settings.bytesize
        instrument.parity = getattr(constants.Parity, _PARITY_NAMES[settings.parity])
        instrument.stop_bits = getattr(constants.StopBits, _STOPBITS_NAMES[settings.stopbits])
        instrument.flow_control = getattr(
            constants.ControlFlow, _FLOW_CONTROL_NAMES[settings.flow_control]
        )

    def _close(self) -> None:
        instrument, self._instrument, self._sock, self._poll = self._instrument, None, None, None
        self._visa_session = None
        self._visalib = self._session = None
        if instrument is not None:
            with contextlib.suppress(Exception):
                self._quiet.close()
            # a session whose peer vanished may refuse to close cleanly
            with contextlib.suppress(Exception):
                instrument.close()

    def _write(self, data: bytes) -> None:
        try:
            if self._timeout_ms is None or self._timeout_ms < WRITE_TIMEOUT_MS:
                self._instrument.timeout = WRITE_TIMEOUT_MS
                self._timeout_ms = WRITE_TIMEOUT_MS
            self._visalib.write(self._session, data)
        except Exception as error:  # sorted out below; pyvisa is imported only on this path
            self._after_write_error(error)
            raise

    def input_waiting(self) -> bool:
        """Return True when received bytes wait: in this transport's buffer, in pyvisa-py's own
        (bytes read past the line it returned), or in the socket; or when the far end closed
        or failed (the read that follows says so). One poll; no look without a socket."""
        if self._buffer or (self._visa_session and self._visa_session._pending_buffer):
            return True
        return self._poll is not None and bool(self._poll.poll(0))

    def _after_write_error(self, error: Exception) -> None:
        """Raise InstrumentDisconnected when a write failed because the wire is gone."""
        import pyvisa

        if isinstance(error, pyvisa.Error | OSError):
            raise InstrumentDisconnected(
                f"VISA resource {self.resource} went away: {error}"
            ) from None

    def _read_available(self, timeout_s: float) -> bytes:
        if self._peer_closed():
            raise InstrumentDisconnected(f"VISA resource {self.resource} closed the connection")
        timeout_ms = max(1, round(timeout_s * 1000))
        if timeout_ms != self._timeout_ms:
            self._instrument.timeout = timeout_ms
            self._timeout_ms = timeout_ms
        try:
            return self._visalib.read(self._session, self._chunk_bytes)[0]
        except Exception as error:  # sorted out below; pyvisa is imported only on this path
            return self._after_read_error(error)

    def _after_read_error(self, error: Exception) -> bytes:
        """Return b"" after a plain timeout; raise InstrumentDisconnected when the wire is gone."""
        import pyvisa
        from pyvisa import constants

        if isinstance(error, pyvisa.VisaIOError):
            if error.error_code != constants.StatusCode.error_timeout:
                raise InstrumentDisconnected(f"VISA resource {self.resource}: {error}") from None
            if self._peer_closed():
                raise InstrumentDisconnected(
                    f"VISA resource {self.resource} closed the connection"
                ) from None
            return b""
        if isinstance(error, pyvisa.Error | OSError):
            raise InstrumentDisconnected(
                f"VISA resource {self.resource} went away: {error}"
            ) from None
        raise error

    def _peer_closed(self) -> bool:
        """Return True when the resource is a socket whose far end has closed or refused.

        One non-blocking peek: it reads b"" after the far end closed, and raises the socket's
        pending error (reset, refused) if there is one. A poll comes first where the system has
        one, and the peek only when it reports a close, an error or a hang-up: with nothing to
        read, or bytes and no close (the common cases), the far end is there.
        """
        sock = self._sock
        if sock is None:
            return False
        if self._poll is not None:
            events = self._poll.poll(0)
            if not events or events[0][1] == _ONLY_BYTES:
                return False
        try:
            return sock.recv(1, _PEEK_WITHOUT_WAITING) == b""
        except BlockingIOError:
            return False
        except OSError:
            return True

    def _socket(self) -> socket.socket | None:
        interface = self.interface
        return interface if isinstance(interface, socket.socket) else None
