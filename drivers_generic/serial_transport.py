"""A serial line through pyserial: a real port, a pseudo-terminal, or any pyserial URL.

pyserial is imported when the port is opened, so importing this module stays cheap.
"""

from __future__ import annotations

import errno
import select
import time
from collections.abc import Callable
from typing import Any

from chargebook.drivers_generic.interface import InstrumentDisconnected, TrafficListener
from chargebook.drivers_generic.profile import Framing, PortSettings
from chargebook.drivers_generic.transport import Transport

_FLOW_KEYWORDS = {
    "none": {},
    "rtscts": {"rtscts": True},
    "xonxoff": {"xonxoff": True},
    "dsrdtr": {"dsrdtr": True},
}


class SerialTransport(Transport):
    """Lines over a serial port (``/dev/ttyUSB0``, a pty path, ``loop://``...) with pyserial."""

    def __init__(
        self,
        port: str,
        settings: PortSettings,
        framing: Framing,
        *,
        write_timeout_s: float = 1.0,
        traffic: TrafficListener | None = None,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        super().__init__(framing, traffic=traffic, clock=clock, name=port)
        self.port = port
        self.settings = settings
        self.write_timeout_s = write_timeout_s
        self._serial: Any = None

    def _open(self) -> None:
        import serial

        settings = self.settings
        try:
            self._serial = serial.serial_for_url(
                self.port,
                baudrate=settings.baud,
                bytesize=settings.bytesize,
                parity=settings.parity,
                stopbits=settings.stopbits,
                timeout=0,
                write_timeout=self.write_timeout_s,
                exclusive=True,  # a second program on the port would corrupt the readings
                **_FLOW_KEYWORDS[settings.flow_control],
            )
            self._serial.reset_input_buffer()
        except (serial.SerialException, OSError, ValueError) as error:
            self._serial = None
            if getattr(error, "errno", None) == errno.EWOULDBLOCK:  # exclusive=True refused
                raise InstrumentDisconnected(
                    f"serial port {self.port} is in use by another program "
                    "(another daemon or terminal holds it); close that program first"
                ) from None
            raise InstrumentDisconnected(f"cannot open serial port {self.port}: {error}") from None

    def _close(self) -> None:
        port, self._serial = self._serial, None
        if port is not None:
            port.close()

    def _write(self, data: bytes) -> None:
        try:
            self._serial.write(data)
        except _port_errors() as error:
            raise InstrumentDisconnected(f"serial port {self.port} went away: {error}") from None

    def input_waiting(self) -> bool:
        """Return True when bytes wait in this transport's buffer or the port's."""
        if self._buffer:
            return True
        try:
            return self._serial is not None and self._serial.in_waiting > 0
        except _port_errors():
            return True  # the read that follows says the port went away

    def _read_available(self, timeout_s: float) -> bytes:
        port = self._serial
        try:
            waiting = port.in_waiting
            if not waiting:
                if not self._wait_readable(timeout_s):
                    return b""
                waiting = max(port.in_waiting, 1)
            return port.read(waiting)
        except _port_errors() as error:
            raise InstrumentDisconnected(f"serial port {self.port} went away: {error}") from None

    def _wait_readable(self, timeout_s: float) -> bool:
        try:
            fd = self._serial.fileno()
        except (AttributeError, OSError, NotImplementedError):
            fd = None
        if fd is None:  # a pyserial URL without a file descriptor: let its own timeout wait
            if self._serial.timeout != timeout_s:
                self._serial.timeout = timeout_s
            return True
        ready, _, _ = select.select([fd], [], [], timeout_s)
        return bool(ready)


def _port_errors() -> tuple[type[BaseException], ...]:
    """Return the exceptions that mean the port went away (pyserial, OS, termios)."""
    import serial

    errors: tuple[type[BaseException], ...] = (serial.SerialException, OSError)
    try:
        import termios
    except ImportError:  # not a POSIX system
        return errors
    return (*errors, termios.error)
