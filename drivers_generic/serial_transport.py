"""A serial line through pyserial: a real port, a pseudo-terminal, or any pyserial URL.

pyserial is imported when the port is opened, so importing this module stays cheap.
"""

from __future__ import annotations

import contextlib
import errno
import os
import select
import threading
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
        #: A pipe whose read end a wakeable wait also watches (see :meth:`wake`): made with the
        #: transport, closed with it, under a lock so that a wake never writes to a closed one.
        self._wake_lock = threading.Lock()
        self._wake_pipe: tuple[int, int] | None = None

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
        with self._wake_lock:
            pipe, self._wake_pipe = self._wake_pipe, None
        if pipe is not None:
            for fd in pipe:
                os.close(fd)

    def wake(self) -> None:
        """End a wakeable wait for pushed lines now (see Transport.wake): one byte down the
        wake pipe, which the wait's ``select`` watches beside the port."""
        with self._wake_lock:
            if self._wake_pipe is not None:
                # a full pipe holds wakes not yet taken: the wait ends anyway
                with contextlib.suppress(BlockingIOError):
                    os.write(self._wake_pipe[1], b"!")

    def _wake_fd(self) -> int:
        """Return the read end of the wake pipe, making the pipe on first use."""
        with self._wake_lock:
            if self._wake_pipe is None:
                read_fd, write_fd = os.pipe()
                os.set_blocking(read_fd, False)
                os.set_blocking(write_fd, False)
                self._wake_pipe = (read_fd, write_fd)
            return self._wake_pipe[0]

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

    def _read_available(self, timeout_s: float) -> bytes | None:
        port = self._serial
        try:
            waiting = port.in_waiting
            if not waiting:
                readable = self._wait_readable(timeout_s)
                if not readable:
                    return None if readable is None else b""
                waiting = max(port.in_waiting, 1)
            return port.read(waiting)
        except _port_errors() as error:
            raise InstrumentDisconnected(f"serial port {self.port} went away: {error}") from None

    def _wait_readable(self, timeout_s: float) -> bool | None:
        """Wait up to ``timeout_s`` for the port to have bytes: True when it has, False on
        timeout, None when a wakeable wait was woken (:meth:`wake`)."""
        try:
            fd = self._serial.fileno()
        except (AttributeError, OSError, NotImplementedError):
            fd = None
        if fd is None:  # a pyserial URL without a file descriptor: let its own timeout wait
            if self._serial.timeout != timeout_s:
                self._serial.timeout = timeout_s
            return True
        if not self._wakeable:
            ready, _, _ = select.select([fd], [], [], timeout_s)
            return bool(ready)
        wake_fd = self._wake_fd()
        ready, _, _ = select.select([fd, wake_fd], [], [], timeout_s)
        if fd in ready:
            return True
        if ready:
            _drain(wake_fd)
            return None
        return False


def _drain(fd: int) -> None:
    """Read a non-blocking pipe empty."""
    with contextlib.suppress(BlockingIOError):
        while os.read(fd, 4096):
            pass


def _port_errors() -> tuple[type[BaseException], ...]:
    """Return the exceptions that mean the port went away (pyserial, OS, termios)."""
    import serial

    errors: tuple[type[BaseException], ...] = (serial.SerialException, OSError)
    try:
        import termios
    except ImportError:  # not a POSIX system
        return errors
    return (*errors, termios.error)
