"""The profile-driven electrometer: one driver for every dialect a profile can describe.

The driver knows no instrument: it looks up a command declaration in the profile, validates its
arguments, sends the rendered lines through a :class:`Transport`, and reads the answer the way
the profile says — a confirmation line (``ack`` style, serial dialects) or nothing followed by a
look at the error queue (``error_queue`` style, SCPI's ``SYST:ERR?``). An instrument error becomes
:class:`InstrumentReportedError`; a line that fits nothing becomes :class:`ProtocolError` carrying
the line; no answer after the profile's retries becomes :class:`InstrumentTimeout`.

In push mode the instrument streams reading lines at any time: lines that arrive while the driver
waits for a confirmation are kept, in order, for :meth:`ProfileElectrometer.next_sample`, and so
are rejected lines (as the ProtocolError to raise there), so nothing read is lost.

A reading whose status field says overrange, underrange, busy or error is returned as a Sample
with that status: the caller records it and decides.
"""

from __future__ import annotations

import time
from collections import deque
from collections.abc import Callable
from typing import TypeVar

from chargebook.drivers_generic.burst import BurstParser
from chargebook.drivers_generic.interface import (
    Capability,
    Identity,
    InstrumentReportedError,
    InstrumentTimeout,
    NotSupported,
    ProtocolError,
    Sample,
    SampleBurst,
)
from chargebook.drivers_generic.lines import decode_line, parse_identity, parse_reading
from chargebook.drivers_generic.profile import COMMAND_CAPABILITY, CommandSpec, Profile
from chargebook.drivers_generic.transport import ReceivedBurst, ReceivedLine, Transport

T = TypeVar("T")

#: The most error-queue entries read after one command (a queue that never empties is a fault).
MAX_ERROR_QUEUE_ENTRIES = 32
#: An answer that takes longer than this share of the profile's timeout counts as slow.
SLOW_SHARE = 0.5
#: Answers looked at to tell a slow instrument: the note stays while any of these was slow.
SLOW_WINDOW = 20
#: The most stale lines dropped before one command (an instrument that never stops talking).
MAX_STALE_LINES = 1000
#: The most command lines kept framed for sending again (commands with arguments vary).
MAX_FRAMES_KEPT = 64


#: What a read that brought nothing in time returns.
_NOTHING = SampleBurst([], None, [], 0)


class _NoReply(Exception):
    """Nothing arrived within the timeout (internal: becomes a retry, then InstrumentTimeout)."""


class ProfileElectrometer:
    """An :class:`~chargebook.drivers_generic.interface.Electrometer` driven by a profile."""

    def __init__(
        self,
        profile: Profile,
        transport: Transport,
        *,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.profile = profile
        self.transport = transport
        self.clock = clock
        self._pending: deque[Sample | ProtocolError | InstrumentReportedError] = deque()
        self._rendered: dict[str, list[str]] = {}  # commands without arguments, rendered
        self._frames: dict[str, bytes] = {}  # lines as sent: encoded, terminated, once each
        self._push = profile.mode == "push"
        self._burst = BurstParser(
            profile.reading, profile.framing, profile.confirmation.ack_pattern
        )
        #: The read query when it is one line without arguments (the common case), or None.
        self._read_query = self._single_line("read")
        #: The latest answers: seconds each took, or None for a late answer set aside.
        self._recent: deque[float | None] = deque(maxlen=SLOW_WINDOW)
        self._unusual = 0  # late or slow answers in _recent
        self._slow_s = SLOW_SHARE * profile.timing.timeout_s  # an answer slower is slow
        self.late_replies = 0  # answers that came after their command was given up on, in all
        #: Plain words when answers are late or slow (None while they come in good time).
        self.reply_note: str | None = None

    # -- the Electrometer interface ------------------------------------------------------------
    @property
    def capabilities(self) -> frozenset[Capability]:
        """Return what this instrument can be asked to do over its wire."""
        return self.profile.capabilities

    def open(self) -> None:
        """Open (or re-open, after InstrumentDisconnected) the transport with no stale input."""
        if self.transport.is_open:
            self.transport.close()
        self._pending.clear()
        self.transport.open()
        self.transport.discard_input()

    def close(self) -> None:
        """Close the transport; a partial line still buffered is recorded as traffic."""
        self.transport.close()

    def identify(self) -> Identity:
        """Return what the instrument says it is."""
        identity = self.profile.identity
        if identity is None:
            raise NotSupported(f"profile {self.profile.name} declares no identity reply")
        encoding = self.profile.framing.encoding
        return self._run("identify", lambda line: parse_identity(identity, line.raw, encoding))

    def zero(self) -> None:
        """Reset the integrator to zero charge."""
        self._run("zero", self._confirmation)

    def start_integration(self) -> None:
        """Start integrating charge."""
        self._run("start", self._confirmation)

    def stop_integration(self) -> None:
        """Stop integrating; the charge holds."""
        self._run("stop", self._confirmation)

    def read_charge(self) -> Sample:
        """Return the integrated charge now, in nC, with the instrument's status."""
        query = self._read_query
        if query is None:  # not declared (refused), or several lines (sent in turn)
            return self._run("read", self._reading)
        return self._exchange(query, self._reading)

    def read_charges(self, count: int) -> list[Sample]:
        """Return ``count`` readings of the integrated charge taken with the read query sent
        ``count`` times in one write, their answers read together and parsed in one pass
        (:class:`BurstParser`; line by line when the answers are not plainly readings).

        Only for an instrument that answers queries kept in flight, in order, one line each
        (the replay's playback of a recording). A live instrument is polled one query at a
        time (:meth:`read_charge`), with its retries; here nothing is sent again: missing
        answers raise InstrumentTimeout, a line that is no reading ProtocolError (the answers
        read with it are recorded as traffic and dropped).
        """
        query = self._read_query
        if query is None or count < 2:
            return [self.read_charge() for _ in range(count)]
        transport, timing = self.transport, self.profile.timing
        if transport.input_waiting():
            self._drop_stale_lines()
        transport.send_all([self._frame(query)] * count)
        timeout_s = timing.timeout_s * (timing.retries + 1)
        deadline = time.monotonic() + timeout_s
        samples: list[Sample] = []
        while len(samples) < count:
            burst = transport.read_burst(max(deadline - time.monotonic(), 0.0))
            if burst is None:
                raise InstrumentTimeout(
                    f"{self.profile.name}: {len(samples)} of {count} answers to {query!r} "
                    f"came within {timeout_s:g} s"
                )
            parsed = self._burst.parse(burst.data, burst.count, burst.t_s)
            samples += parsed if parsed is not None else self._answers_by_line(burst)
        if len(samples) > count:
            raise ProtocolError(f"{len(samples)} answers came to {count} queries", b"")
        return samples

    def _answers_by_line(self, burst: ReceivedBurst) -> list[Sample]:
        """Return the readings of a burst of answers parsed line by line (raises at the first
        line that is not one, as :meth:`read_charge` would)."""
        lines = burst.data.split(self.profile.framing.read_terminator)[: burst.count]
        return [self._reading(ReceivedLine(burst.t_s, raw)) for raw in lines]

    def next_sample(self, timeout_s: float) -> Sample | None:
        """Return the next reading line the instrument sends unasked, or None after timeout_s."""
        if self._pending:
            return self._unqueue()
        deadline = time.monotonic() + timeout_s
        while True:
            line = self.transport.read_line(max(deadline - time.monotonic(), 0.0))
            if line is None:
                return None
            sample = self._pushed(line)
            if sample is not None:
                return sample

    def read_samples(self, timeout_s: float) -> SampleBurst:
        """Return the reading lines the instrument sent unasked that one read brings, waiting
        up to ``timeout_s`` for the first: a whole burst parsed in one pass when it is plainly
        a run of readings (:class:`BurstParser`), else line by line as :meth:`next_sample`
        reads them. Samples kept while a command was answered come first, in a burst of their
        own; a refusal the instrument pushed (InstrumentReportedError) is raised in its turn.
        """
        if self._pending:
            return self._pending_burst()
        try:
            burst = self.transport.read_burst(timeout_s, wakeable=True)
        except ProtocolError as error:  # an over-long line, refused on its own
            return SampleBurst([], None, [error], 1)
        if burst is None:
            return _NOTHING
        samples = self._burst.parse(burst.data, burst.count, burst.t_s)
        if samples is not None:
            return SampleBurst(samples, None, [], burst.count)
        return self._burst_by_line(burst)

    def wake(self) -> None:
        """End a :meth:`read_samples` wait in another thread now (it returns nothing, as on a
        timeout): the daemon's thread then sends the commands just queued for it."""
        self.transport.wake()

    def set_bias(self, volts: float) -> None:
        """Set the chamber bias in volts, signed; refused outside the profile's limits."""
        self._run("set_bias", self._confirmation, volts=volts)

    def set_range(self, name: str) -> None:
        """Select a measurement range by the profile's name for it."""
        self._run("set_range", self._confirmation, range=name)

    # -- commands ------------------------------------------------------------------------------
    def _spec(self, name: str) -> CommandSpec:
        capability = COMMAND_CAPABILITY[name]
        if capability not in self.profile.capabilities:
            raise NotSupported(
                f"{self.profile.name} cannot {name.replace('_', ' ')} over its wire "
                f"(no '{capability}' capability): the operator does this step by hand"
            )
        return self.profile.command(name)

    def _run(self, name: str, interpret: Callable[[ReceivedLine], T], **arguments: object) -> T:
        spec = self._spec(name)
        result = None
        for line in self._lines(spec, arguments):
            if spec.parser == "ack" and self.profile.confirmation.style == "error_queue":
                self.transport.write_line(line)
                self._check_error_queue(line)
            else:
                result = self._exchange(line, interpret)
        return result  # type: ignore[return-value]

    def _single_line(self, name: str) -> str | None:
        """Return command ``name``'s line when the instrument can do it and it is one line
        without arguments (rendered here, once), else None."""
        spec = self.profile.commands.get(name)
        if (
            spec is None
            or COMMAND_CAPABILITY[name] not in self.profile.capabilities
            or spec.arguments
            or len(spec.templates) != 1
        ):
            return None
        return self._lines(spec, {})[0]

    def _lines(self, spec: CommandSpec, arguments: dict[str, object]) -> list[str]:
        """Return the command's lines; a command without arguments is rendered once."""
        if arguments:
            return spec.render(**arguments)
        lines = self._rendered.get(spec.name)
        if lines is None:
            lines = self._rendered[spec.name] = spec.render()
        return lines

    def _exchange(
        self, line: str, interpret: Callable[[ReceivedLine], T], *, ask_error_queue: bool = True
    ) -> T:
        """Send ``line`` and return its interpreted answer, resending on silence.

        After the last silent attempt the error queue is asked why, once (``ask_error_queue``);
        the error query itself never asks again, so a mute instrument ends in
        :class:`InstrumentTimeout`, not in a chain of queries without end.
        """
        timing = self.profile.timing
        frame = self._frame(line)
        for _ in range(timing.retries + 1):
            try:
                return self._ask(frame, interpret, timing.timeout_s)
            except _NoReply:
                continue
        if ask_error_queue and self.profile.confirmation.style == "error_queue":
            self._check_error_queue(line)
        raise InstrumentTimeout(
            f"{self.profile.name}: no answer to {line!r} after {timing.retries + 1} attempt(s) "
            f"of {timing.timeout_s} s"
        )

    def _frame(self, line: str) -> bytes:
        """Return ``line`` as sent, framed by the transport once (commands without arguments
        are sent again and again; those with arguments are kept until there are many)."""
        frame = self._frames.get(line)
        if frame is None:
            frame = self.transport.frame(line)
            if len(self._frames) < MAX_FRAMES_KEPT:
                self._frames[line] = frame
        return frame

    def _ask(self, frame: bytes, interpret: Callable[[ReceivedLine], T], timeout_s: float) -> T:
        """Send ``frame`` once and return its interpreted answer; raise _NoReply when none came
        within ``timeout_s``.

        The common case is flat: one write, one line read, one parse. Lines waiting before the
        write are late answers (taken first, :meth:`_drop_stale_lines`); a line that is not
        this command's answer is set aside on the way (:meth:`_set_aside`).
        """
        transport = self.transport
        if transport.input_waiting():
            self._drop_stale_lines()
        transport.send(frame)
        sent_s = time.monotonic()
        keep_readings = self._push and interpret != self._reading  # pushed while waiting
        remaining_s = timeout_s
        while True:
            try:
                line = transport.read_line(remaining_s)
                if line is None:
                    raise _NoReply
                if not (keep_readings and self._keep_if_reading(line)):
                    answer = interpret(line)
                    self._remember_answer(time.monotonic() - sent_s)
                    return answer
            except ProtocolError as error:
                self._set_aside(error)
            remaining_s = max(sent_s + timeout_s - time.monotonic(), 0.0)

    def _set_aside(self, error: ProtocolError) -> None:
        """Keep a refused line for next_sample (push mode) or count it as a late answer to an
        earlier command; raise ``error`` when it is this command's answer, and wrong."""
        if self._push:
            self._pending.append(error)
        elif error.line and self._answers_another_command(error.line):
            self._late_reply()  # a late answer to an earlier command: not this one's
        else:
            raise error

    # -- late and slow answers -----------------------------------------------------------------
    def _drop_stale_lines(self) -> None:
        """Before a query, take every line already waiting: in query mode each is a late answer
        to a command given up on (kept as traffic, counted, never taken as the next answer);
        in push mode each is a pushed line, kept for next_sample."""
        if self.profile.mode == "push":
            return
        for _ in range(MAX_STALE_LINES):
            if not self.transport.input_waiting():
                return
            try:
                line = self.transport.read_line(0.0)
            except ProtocolError:
                line = True  # an unreadable stale line: dropped all the same
            if line is None:  # only part of a line: the rest is still to come
                return
            self._late_reply()

    def _answers_another_command(self, raw: bytes) -> bool:
        """Return True if ``raw`` is a well-formed answer of another kind (a reading while a
        confirmation was awaited, or the reverse): the answer to an earlier command."""
        line = ReceivedLine(0.0, raw)
        if self._is_confirmation(line):
            return True
        try:
            self._reading(line)
        except (ProtocolError, InstrumentReportedError):
            return False
        return True

    def _late_reply(self) -> None:
        self.late_replies += 1
        self._remember_answer(None)

    def _remember_answer(self, answer_s: float | None) -> None:
        """Add an answer's time (None: a late answer set aside) to the latest answers, and
        say again what they show unless all of them came in good time, as before."""
        recent, slow_s = self._recent, self._slow_s
        if len(recent) == recent.maxlen:
            oldest = recent[0]  # leaves the window
            if oldest is None or oldest > slow_s:
                self._unusual -= 1
        recent.append(answer_s)
        if answer_s is None or answer_s > slow_s:
            self._unusual += 1
        if self._unusual or self.reply_note is not None:
            self._update_reply_note()  # words only while some answer is late or slow

    def _update_reply_note(self) -> None:
        """Say, from the latest answers, whether answers come late or slow (None: in time)."""
        timeout_s = self.profile.timing.timeout_s
        late = sum(1 for s in self._recent if s is None)
        slow = [s for s in self._recent if s is not None and s > SLOW_SHARE * timeout_s]
        notes = []
        if late:
            notes.append(
                f"{late} late answer(s) among the last {len(self._recent)} set aside (each came "
                "after its command was sent again or given up on)"
            )
        if slow:
            notes.append(
                f"answers are slow: {len(slow)} of the last {len(self._recent)} took over "
                f"{SLOW_SHARE * timeout_s:g} s (longest {max(slow):.2f} s of the {timeout_s:g} s "
                "allowed)"
            )
        if notes:
            notes.append("check the cable, the port settings and the instrument")
        self.reply_note = "; ".join(notes) or None

    def _check_error_queue(self, command: str) -> None:
        """Read the error queue until it reports no error; raise if it held any."""
        confirmation = self.profile.confirmation
        errors: list[str] = []
        for _ in range(MAX_ERROR_QUEUE_ENTRIES):
            code, message = self._exchange(
                confirmation.error_query, self._error_entry, ask_error_queue=False
            )
            if code == confirmation.no_error_code:
                break
            errors.append(f"{code},{message}")
        else:
            errors.append(f"(error queue still not empty after {MAX_ERROR_QUEUE_ENTRIES} reads)")
        if errors:
            raise InstrumentReportedError(
                f"{self.profile.name} reported after {command!r}: " + "; ".join(errors)
            )

    # -- interpreting answers ------------------------------------------------------------------
    def _text(self, line: ReceivedLine) -> str:
        return decode_line(line.raw, self.profile.framing.encoding)

    def _confirmation(self, line: ReceivedLine) -> None:
        confirmation = self.profile.confirmation
        text = self._text(line)
        if confirmation.ack_pattern is not None and confirmation.ack_pattern.fullmatch(text):
            return None
        self._raise_if_refusal(text)
        raise ProtocolError(f"expected a confirmation, got {text[:80]!r}", line.raw)

    def _reading(self, line: ReceivedLine) -> Sample:
        profile = self.profile
        try:
            return parse_reading(profile.reading, line.raw, line.t_s, profile.framing.encoding)
        except ProtocolError:
            self._raise_if_refusal(self._text(line))
            raise

    def _error_entry(self, line: ReceivedLine) -> tuple[int, str]:
        text = self._text(line)
        match = self.profile.confirmation.error_pattern.fullmatch(text)
        if match is None:
            raise ProtocolError(f"expected an error-queue entry, got {text[:80]!r}", line.raw)
        return int(match["code"]), match["message"]

    def _raise_if_refusal(self, text: str) -> None:
        confirmation = self.profile.confirmation
        if confirmation.style != "ack" or confirmation.error_pattern is None:
            return
        match = confirmation.error_pattern.fullmatch(text)
        if match is not None:
            code = match["code"]
            meaning = confirmation.error_messages.get(code, "no description in the profile")
            raise InstrumentReportedError(
                f"{self.profile.name} refused the command: error {code} ({meaning})"
            )

    def _pushed(self, line: ReceivedLine) -> Sample | None:
        """Return the reading a pushed line holds, or None for a stray confirmation (a late ack).

        The line is parsed as a reading first (the common case in a stream: decoded once).
        """
        try:
            sample = self._reading(line)
        except ProtocolError:
            if self._is_confirmation(line):
                return None
            raise
        pattern = self.profile.confirmation.ack_pattern
        if pattern is not None and pattern.fullmatch(sample.raw):
            return None
        return sample

    def _is_confirmation(self, line: ReceivedLine) -> bool:
        """Return True for a stray confirmation (a late ack), which carries no reading."""
        pattern = self.profile.confirmation.ack_pattern
        if pattern is None:
            return False
        try:
            return pattern.fullmatch(self._text(line)) is not None
        except ProtocolError:
            return False

    def _keep_if_reading(self, line: ReceivedLine) -> bool:
        try:
            sample = self._reading(line)
        except (ProtocolError, InstrumentReportedError):
            return False
        self._pending.append(sample)
        return True

    def _burst_by_line(self, burst: ReceivedBurst) -> SampleBurst:
        """Parse a burst line by line (see :meth:`read_samples`); a refusal the instrument
        pushed ends the burst: it and the lines after it are kept for the next call."""
        samples: list[Sample] = []
        places: list[int] = []
        rejected: list[ProtocolError] = []
        terminator = self.profile.framing.read_terminator
        lines = burst.data.split(terminator)[: burst.count]
        for place, raw in enumerate(lines):
            try:
                sample = self._pushed(ReceivedLine(burst.t_s, raw))
            except ProtocolError as error:
                rejected.append(error)
                continue
            except InstrumentReportedError as error:
                self._pending.append(error)
                for rest in lines[place + 1 :]:
                    self._keep_pushed(ReceivedLine(burst.t_s, rest))
                break
            if sample is not None:
                samples.append(sample)
                places.append(place)
        return SampleBurst(samples, places, rejected, burst.count)

    def _keep_pushed(self, line: ReceivedLine) -> None:
        """Keep what a pushed line holds for later: its sample, or the error it raises."""
        try:
            sample = self._pushed(line)
        except (ProtocolError, InstrumentReportedError) as error:
            self._pending.append(error)
            return
        if sample is not None:
            self._pending.append(sample)

    def _pending_burst(self) -> SampleBurst:
        """Return the samples and refused lines kept earlier, up to the first refusal the
        instrument sent (raised when it comes first)."""
        samples: list[Sample] = []
        rejected: list[ProtocolError] = []
        pending = self._pending
        while pending:
            item = pending[0]
            if isinstance(item, InstrumentReportedError):
                if samples or rejected:
                    break
                pending.popleft()
                raise item
            pending.popleft()
            (rejected if isinstance(item, ProtocolError) else samples).append(item)
        return SampleBurst(samples, [-1] * len(samples), rejected, len(samples) + len(rejected))

    def _unqueue(self) -> Sample:
        item = self._pending.popleft()
        if isinstance(item, ProtocolError | InstrumentReportedError):
            raise item
        return item
