"""The one small interface every electrometer driver offers the daemon.

Drivers are synchronous (pyserial and pyvisa are); the daemon calls them from a worker thread.
Charge is always reported in nanocoulombs, signed as read. Times are seconds on the clock the
driver was given (``time.monotonic`` unless a test or a replay injects another).

A capability the instrument lacks is declared absent, never faked: calling the method raises
:class:`NotSupported`, and the daemon asks the operator to do the step by hand instead.
"""

from __future__ import annotations

import enum
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import NamedTuple, Protocol, runtime_checkable


class Capability(enum.StrEnum):
    """What an electrometer can be asked to do over its wire."""

    IDENTIFY = "identify"
    ZERO = "zero"  # reset the integrator / null the input
    INTEGRATE = "integrate"  # start and stop charge integration on command
    READ_CHARGE = "read_charge"  # query the integrated charge
    STREAM = "stream"  # the instrument pushes (time, charge) samples while integrating
    PUSH_READINGS = "push_readings"  # the instrument pushes a completed reading at end of beam
    #: after pushing a completed reading the instrument zeroes its integrator and integrates the
    #: next reading by itself (an auto-reset mode): it is not stopped, zeroed and started again
    #: between the readings of a set
    AUTO_RESET = "auto_reset"
    SET_BIAS = "set_bias"  # the bias supply is under remote control
    SET_RANGE = "set_range"


class ReadingStatus(enum.StrEnum):
    """Status the instrument attached to a value, mapped from the profile's status field."""

    OK = "ok"
    OVERRANGE = "overrange"
    UNDERRANGE = "underrange"
    BUSY = "busy"
    ERROR = "error"


class Sample(NamedTuple):
    """One charge value read from the instrument.

    ``t_s`` is the receive time on the driver's clock; ``charge_nC`` the signed integrated charge
    in nC; ``complete`` is True when the instrument itself marked this as a finished reading
    (push-readings mode); ``raw`` is the line as received, decoded with errors replaced.

    Immutable, as a frozen dataclass would be, and made in a fifth of the time: one is made for
    every line a streaming instrument pushes, up to tens of thousands a second.
    """

    t_s: float
    charge_nC: float
    status: ReadingStatus = ReadingStatus.OK
    complete: bool = False
    raw: str = ""


class TrafficDirection(enum.StrEnum):
    SENT = "tx"
    RECEIVED = "rx"


#: Called by the transport for every line sent or received, before it is parsed:
#: (direction, t_s, raw bytes including terminators as far as they were seen). A listener that
#: also has a ``burst`` attribute (a :data:`TrafficBurstListener`) is told the lines one read
#: brought in one call instead: see :class:`TrafficListeners`.
TrafficListener = Callable[[TrafficDirection, float, bytes], None]
#: Told the lines one read brought, in one call: (direction, t_s they arrived at, the raw bytes
#: of each line, terminator included), in order.
TrafficBurstListener = Callable[[TrafficDirection, float, Sequence[bytes]], None]


class TrafficListeners:
    """A :data:`TrafficListener` that is told single lines by ``one`` and the lines of one read
    together by ``burst`` (a streaming instrument's lines, thousands a second)."""

    __slots__ = ("burst", "one")

    def __init__(self, one: TrafficListener, burst: TrafficBurstListener) -> None:
        self.one = one
        self.burst = burst

    def __call__(self, direction: TrafficDirection, t_s: float, raw: bytes) -> None:
        self.one(direction, t_s, raw)


class SampleBurst(NamedTuple):
    """The pushed lines one read brought: ``samples`` in order; ``lines`` the place of each
    sample's line among the lines the read recorded as traffic (None: one sample a line, in
    order; -1: a sample read earlier, kept while a command was answered); ``rejected`` the
    lines refused, as the ProtocolError each raised; ``count`` how many lines were read (0:
    nothing arrived in time)."""

    samples: list[Sample]
    lines: list[int] | None
    rejected: list[ProtocolError]
    count: int


class InstrumentError(Exception):
    """Base of every error an electrometer driver raises."""


class InstrumentTimeout(InstrumentError):
    """The instrument did not answer within the profile's timeout (after its retries)."""


class InstrumentDisconnected(InstrumentError):
    """The port or socket went away (cable pulled, pty closed, connection reset)."""


class ProtocolError(InstrumentError):
    """A line that does not match the profile: garbled, partial, over-long, NaN/inf, not UTF-8.

    ``line`` holds the raw bytes so that the caller can record the rejected line.
    """

    def __init__(self, message: str, line: bytes = b"") -> None:
        super().__init__(message)
        self.line = line


class InstrumentReportedError(InstrumentError):
    """The instrument's error queue (SCPI ``SYST:ERR?``) or status field reported an error."""


class NotSupported(InstrumentError):
    """The instrument lacks this capability; the operator must do the step by hand."""


class SettingOutOfRange(InstrumentError, ValueError):
    """A setting was refused before it reached the wire: outside what the profile allows.

    Nothing is clamped: the caller learns the ``field``, the ``value`` and what is ``allowed``.
    """

    def __init__(self, field: str, value: object, allowed: str) -> None:
        super().__init__(f"{field} = {value!r} is not allowed; allowed: {allowed}")
        self.field = field
        self.value = value
        self.allowed = allowed


@dataclass(frozen=True, slots=True)
class Identity:
    """What the instrument says it is (``*IDN?`` fields, or the profile's identity query)."""

    manufacturer: str
    model: str
    serial: str
    firmware: str
    raw: str = ""


@runtime_checkable
class Electrometer(Protocol):
    """The interface the daemon programs against. See the module docstring for conventions."""

    @property
    def capabilities(self) -> frozenset[Capability]: ...

    def open(self) -> None:
        """Open the transport. Raises InstrumentDisconnected when the port is not there."""

    def close(self) -> None: ...

    def identify(self) -> Identity: ...

    def zero(self) -> None: ...

    def start_integration(self) -> None: ...

    def stop_integration(self) -> None: ...

    def read_charge(self) -> Sample:
        """Query the integrated charge now (query mode)."""

    def next_sample(self, timeout_s: float) -> Sample | None:
        """Return the next pushed sample (stream / push-readings mode), or None on timeout."""

    def read_samples(self, timeout_s: float) -> SampleBurst:
        """Return the pushed samples one read brings, waiting up to ``timeout_s`` for the first
        line (stream / push-readings mode); raises an InstrumentError the instrument sent."""

    def wake(self) -> None:
        """End a :meth:`read_samples` wait in another thread at once (from any thread): it
        returns no samples, as on a timeout."""

    def set_bias(self, volts: float) -> None:
        """Set the chamber bias in volts, signed. Raises NotSupported without SET_BIAS."""

    def set_range(self, name: str) -> None: ...
