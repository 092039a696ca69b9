"""The one transport interface: write a line, read a line with a timeout.

:class:`Transport` does the framing for every wire in one place: it adds the write terminator,
cuts received bytes into lines at the read terminator, refuses over-long lines (they are reported
and skipped up to the next terminator, never buffered forever), logs every line at DEBUG and calls
the :data:`TrafficListener` for every line sent or received. Subclasses only move bytes:
:class:`SerialTransport` (pyserial), :class:`VisaTransport` (pyvisa ``@py``) and
:class:`ScriptedTransport` (a list of (command, reply) pairs, for protocol tests that read like
the instrument's manual).

Reads never sleep: they wait on the port with the caller's timeout, so a flood of lines is read
as fast as it arrives.
"""

from __future__ import annotations

import logging
import re
import time
from abc import ABC, abstractmethod
from collections.abc import Callable, Iterable, Sequence
from typing import NamedTuple, TypeVar

from chargebook.drivers_generic.interface import (
    InstrumentDisconnected,
    ProtocolError,
    TrafficBurstListener,
    TrafficDirection,
    TrafficListener,
)
from chargebook.drivers_generic.profile import Framing

wire_log = logging.getLogger("chargebook.drivers_generic.wire")

T = TypeVar("T")


class ReceivedLine(NamedTuple):
    """One line as received: ``t_s`` on the transport's clock, ``raw`` without its terminator."""

    t_s: float
    raw: bytes


class ReceivedBurst(NamedTuple):
    """The complete lines one read brought: ``t_s`` on the transport's clock (they arrived
    together), ``data`` the ``count`` lines as received, each with its terminator."""

    t_s: float
    data: bytes
    count: int


class Transport(ABC):
    """Base of every transport: framing, over-long line refusal, DEBUG logging, traffic calls."""

    def __init__(
        self,
        framing: Framing,
        *,
        traffic: TrafficListener | None = None,
        clock: Callable[[], float] = time.monotonic,
        name: str = "",
    ) -> None:
        self.framing = framing
        self.traffic = traffic
        #: Told a burst of lines in one call when the listener offers it (see TrafficListener).
        self.traffic_burst: TrafficBurstListener | None = getattr(traffic, "burst", None)
        self.clock = clock
        self.name = name
        self._buffer = bytearray()
        self._discarding = False
        self._open_now = False
        self._line_cutter: tuple[bytes, re.Pattern[bytes]] | None = None
        #: True while a read waits for lines the instrument pushes unasked: only such a wait
        #: may be cut short by :meth:`wake` (a command's answer is always waited for).
        self._wakeable = False

    # -- what subclasses implement -------------------------------------------------------------
    @abstractmethod
    def _open(self) -> None:
        """Open the wire; raise InstrumentDisconnected when it is not there."""

    @abstractmethod
    def _close(self) -> None: ...

    @abstractmethod
    def _write(self, data: bytes) -> None:
        """Send bytes; raise InstrumentDisconnected when the wire is gone."""

    @abstractmethod
    def _read_available(self, timeout_s: float) -> bytes | None:
        """Return the bytes that arrive within ``timeout_s`` (b"" if none); never sleep longer.

        None means "stop waiting": nothing can arrive before the next write (a script), or
        :meth:`wake` cut a wakeable wait short.
        """

    def wake(self) -> None:  # noqa: B027 (a transport whose waits are short need not)
        """Make a wait for pushed lines (``read_burst(..., wakeable=True)``) in another thread
        return at once, as if it timed out; safe to call from any thread, at any time. A
        transport whose waits are short anyway does nothing."""

    # -- the interface -------------------------------------------------------------------------
    @property
    def is_open(self) -> bool:
        """Return True while the wire is open."""
        return self._open_now

    def open(self) -> None:
        """Open the wire with an empty receive buffer."""
        self._buffer.clear()
        self._discarding = False
        self._open()
        self._open_now = True

    def close(self) -> None:
        """Close the wire; a partial line still buffered is recorded as received traffic."""
        self._flush_partial()
        if self._open_now:
            self._open_now = False
            self._close()

    def frame(self, line: str | bytes) -> bytes:
        """Return the bytes that send ``line``: encoded, with the profile's write terminator."""
        data = line.encode(self.framing.encoding) if isinstance(line, str) else line
        return data + self.framing.write_terminator

    def write_line(self, line: str | bytes) -> None:
        """Send one line, adding the profile's write terminator."""
        self.send(self.frame(line))

    def send(self, frame: bytes) -> None:
        """Send a line already framed by :meth:`frame` (a command rendered once, sent often)."""
        if not self._open_now:
            raise InstrumentDisconnected(f"{self.name or 'transport'} is not open")
        self._record(TrafficDirection.SENT, frame)
        self._write_or_lose(self._write, frame)

    def send_all(self, frames: Sequence[bytes]) -> None:
        """Send lines framed by :meth:`frame` in one write (queries kept in flight: see
        ``ProfileElectrometer.read_charges``), each recorded as a line of its own, at one time
        (the burst listener is told them in one call when there is one)."""
        if not self._open_now:
            raise InstrumentDisconnected(f"{self.name or 'transport'} is not open")
        self._record_all(TrafficDirection.SENT, frames)
        self._write_or_lose(self._write_all, frames)

    def _write_or_lose(self, write: Callable[[T], None], data: T) -> None:
        """Run ``write(data)``; when the wire is gone, mark it lost and raise."""
        try:
            write(data)
        except InstrumentDisconnected:
            self._lost()
            raise

    def _write_all(self, frames: Sequence[bytes]) -> None:
        """Send the framed lines; one write of them all, unless a wire must take them apart."""
        self._write(b"".join(frames))

    def read_line(self, timeout_s: float) -> ReceivedLine | None:
        """Return the next complete line within ``timeout_s`` seconds, or None on timeout.

        Raises ProtocolError (carrying the first ``max_line_bytes`` bytes) for an over-long line,
        and InstrumentDisconnected when the wire goes away.
        """
        return self._read(timeout_s, self._take_line)

    def read_burst(self, timeout_s: float, *, wakeable: bool = False) -> ReceivedBurst | None:
        """Return every complete line received so far, waiting up to ``timeout_s`` seconds for
        the first (None on timeout): framed, checked and recorded as traffic in one pass.
        ``wakeable``: the wait is for lines pushed unasked, and :meth:`wake` may end it early
        (None, as a timeout).

        Raises as :meth:`read_line` does; an over-long line is refused on its own, the lines
        before it come first in a burst of their own.
        """
        if not wakeable:
            return self._read(timeout_s, self._take_burst)
        self._wakeable = True
        try:
            return self._read(timeout_s, self._take_burst)
        finally:
            self._wakeable = False

    def _read(self, timeout_s: float, take: Callable[[], T | None]) -> T | None:
        """Return what ``take`` cuts from the received bytes, reading more for up to
        ``timeout_s`` seconds while it cuts nothing."""
        if not self._open_now:
            raise InstrumentDisconnected(f"{self.name or 'transport'} is not open")
        if self._buffer:
            taken = take()
            if taken is not None:
                return taken
        remaining = timeout_s if timeout_s > 0 else 0.0
        deadline = time.monotonic() + remaining
        while True:
            try:
                chunk = self._read_available(remaining)
            except InstrumentDisconnected:
                self._lost()
                raise
            if chunk:
                self._buffer += chunk
                taken = take()
                if taken is not None:
                    return taken
            elif chunk is None or remaining <= 0:
                return None
            remaining = max(deadline - time.monotonic(), 0.0)

    def input_waiting(self) -> bool:
        """Return True when received bytes wait to be read (those already buffered here; a
        transport that can ask its wire cheaply asks it too)."""
        return bool(self._buffer)

    def discard_input(self) -> None:
        """Drop whatever arrived and was not read yet (stale lines from before an open)."""
        self._buffer.clear()
        self._discarding = False
        for _ in range(1000):  # bounded: an instrument that streams never runs dry
            if not (self._open_now and self._read_available(0.0)):
                break

    # -- framing -------------------------------------------------------------------------------
    def _take_line(self) -> ReceivedLine | None:
        terminator = self.framing.read_terminator
        limit = self.framing.max_line_bytes
        while True:
            end = self._buffer.find(terminator)
            if self._discarding:
                if end < 0:
                    keep = len(terminator) - 1
                    del self._buffer[: max(len(self._buffer) - keep, 0)]
                    return None
                del self._buffer[: end + len(terminator)]
                self._discarding = False
                continue
            if end < 0:
                # the line so far, and maybe the first bytes of its terminator: a line of
                # max_line_bytes whose CR came without its LF is not over-long yet
                if len(self._buffer) > limit + len(terminator) - 1:
                    self._refuse_long_line(bytes(self._buffer[:limit]))
                return None
            data = bytes(self._buffer[: end + len(terminator)])
            del self._buffer[: end + len(terminator)]
            t_s = self._record(TrafficDirection.RECEIVED, data)
            if end > limit:
                raise ProtocolError(f"line longer than {limit} bytes", data[:limit])
            return ReceivedLine(t_s, data[:end])

    def _take_burst(self) -> ReceivedBurst | None:
        terminator = self.framing.read_terminator
        buffer = self._buffer
        end = -1 if self._discarding else buffer.rfind(terminator)
        if end >= 0:
            data = bytes(buffer[: end + len(terminator)])
            lines = self._lines_of(data)
            if max(map(len, lines)) <= self.framing.max_line_bytes + len(terminator):
                del buffer[: len(data)]
                return ReceivedBurst(self._record_burst(lines), data, len(lines))
        line = self._take_line()  # an over-long line, or the rest of one being skipped
        return None if line is None else ReceivedBurst(line.t_s, line.raw + terminator, 1)

    def _lines_of(self, data: bytes) -> list[bytes]:
        """Return the lines of ``data`` (which ends with a terminator), terminators kept."""
        terminator = self.framing.read_terminator
        if self._line_cutter is None or self._line_cutter[0] != terminator:
            self._line_cutter = (terminator, _line_pattern(terminator))
        return self._line_cutter[1].findall(data)

    def _record_burst(self, lines: list[bytes]) -> float:
        """Record received ``lines`` as traffic, all at one time; return it."""
        return self._record_all(TrafficDirection.RECEIVED, lines)

    def _record_all(self, direction: TrafficDirection, lines: Sequence[bytes]) -> float:
        """Record ``lines`` going ``direction`` as traffic, all at one time; return it."""
        t_s = self.clock()
        if wire_log.isEnabledFor(logging.DEBUG):
            for data in lines:
                wire_log.debug("%s %s %r", self.name, direction.value, data)
        if self.traffic_burst is not None:
            self.traffic_burst(direction, t_s, lines)
        elif self.traffic is not None:
            for data in lines:
                self.traffic(direction, t_s, data)
        return t_s

    def _refuse_long_line(self, head: bytes) -> None:
        self._buffer.clear()
        self._discarding = True
        self._record(TrafficDirection.RECEIVED, head)
        limit = self.framing.max_line_bytes
        raise ProtocolError(f"line longer than {limit} bytes without a terminator", head)

    def _record(self, direction: TrafficDirection, data: bytes) -> float:
        t_s = self.clock()
        if wire_log.isEnabledFor(logging.DEBUG):
            wire_log.debug("%s %s %r", self.name, direction.value, data)
        if self.traffic is not None:
            self.traffic(direction, t_s, data)
        return t_s

    def _flush_partial(self) -> None:
        if self._buffer and not self._discarding:
            self._record(TrafficDirection.RECEIVED, bytes(self._buffer))
        self._buffer.clear()
        self._discarding = False

    def _lost(self) -> None:
        self._flush_partial()
        self._open_now = False
        try:
            self._close()
        except Exception:  # the wire is already gone; closing it is best effort
            wire_log.debug("%s: close after loss failed", self.name, exc_info=True)


def _line_pattern(terminator: bytes) -> re.Pattern[bytes]:
    """Return the pattern of one line up to and with its first ``terminator``: for a
    one-byte terminator, a run of other bytes (three times faster than a lazy match, which
    tries the terminator after every byte)."""
    end = re.escape(terminator)
    if len(terminator) == 1:
        return re.compile(b"[^" + end + b"]*" + end)
    return re.compile(b".*?" + end, re.S)


class ScriptMismatch(AssertionError):
    """A scripted exchange did not go as the script says (unexpected command, unused pair)."""


#: A reply that stands for "the cable was pulled here".
DISCONNECT = object()


class ScriptedTransport(Transport):
    """A transport that plays an instrument from a script of (command, reply) pairs.

    ``command`` is the line the driver must send (without terminator), or None for lines the
    instrument sends unasked. ``reply`` is a line, a list of lines, None for no answer at all, or
    :data:`DISCONNECT`. A str gets the profile's read terminator; bytes are delivered exactly as
    given (garbled, partial or over-long lines). Sending anything other than the next expected
    command raises ScriptMismatch; so does :meth:`verify` (called by close) if pairs are unused.
    """

    def __init__(
        self,
        framing: Framing,
        pairs: Iterable[tuple[str | None, object]],
        *,
        traffic: TrafficListener | None = None,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        super().__init__(framing, traffic=traffic, clock=clock, name="script")
        self._pairs = list(pairs)
        self._incoming = bytearray()
        self._gone = False
        self.sent: list[bytes] = []

    def _open(self) -> None:
        if self._gone:
            raise InstrumentDisconnected("scripted instrument is disconnected")

    def _close(self) -> None:
        pass

    def close(self) -> None:
        """Close, then fail if the script has pairs the driver never used."""
        super().close()
        self.verify()

    def verify(self) -> None:
        """Raise ScriptMismatch if any scripted pair was not used."""
        if self._pairs:
            raise ScriptMismatch(f"unused scripted pairs: {self._pairs!r}")

    def _write(self, data: bytes) -> None:
        if self._gone:
            raise InstrumentDisconnected("scripted instrument is disconnected")
        self.sent.append(data)
        line = data[: -len(self.framing.write_terminator)].decode(self.framing.encoding)
        if not self._pairs or self._pairs[0][0] != line:
            expected = self._pairs[0][0] if self._pairs else "nothing more"
            raise ScriptMismatch(f"driver sent {line!r}; the script expects {expected!r}")
        _, reply = self._pairs.pop(0)
        self._queue(reply)
        self._deliver_unasked()

    def _deliver_unasked(self) -> None:
        while self._pairs and self._pairs[0][0] is None:
            _, reply = self._pairs.pop(0)
            self._queue(reply)

    def _queue(self, reply: object) -> None:
        if reply is None:
            return
        if reply is DISCONNECT:
            self._gone = True
            return
        replies: Sequence = reply if isinstance(reply, list) else [reply]
        for item in replies:
            data = item.encode(self.framing.encoding) if isinstance(item, str) else bytes(item)
            if isinstance(item, str):
                data += self.framing.read_terminator
            self._incoming += data

    def discard_input(self) -> None:
        """Drop buffered input only: the script's lines are what arrives after the open."""
        self._buffer.clear()
        self._incoming.clear()

    def _write_all(self, frames: Sequence[bytes]) -> None:
        for frame in frames:  # the script answers one command at a time
            self._write(frame)

    def _read_available(self, timeout_s: float) -> bytes | None:
        self._deliver_unasked()
        if self._incoming:
            data = bytes(self._incoming)
            self._incoming.clear()
            return data
        if self._gone:
            raise InstrumentDisconnected("scripted instrument is disconnected")
        return None
