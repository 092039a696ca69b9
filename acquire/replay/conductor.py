"""The replay's loop: the recorded traffic through the real driver, the logged inputs through the
real engine, each at its recorded place.

The :class:`Conductor` walks the session's input log in order. Before each input it plays the
recorded lines up to the input's place, so that the simulated instrument stays in step:

* a line the engine took a sample from is read by the real driver (``read_charge`` when it
  answers a poll, ``next_sample`` when the instrument pushed it), and the sample the driver
  parses must be the one logged (time, charge, status, completeness): a mismatch is reported by
  name;
* every other line is sent or read as recorded, through the driver's transport.

At speed 0, an exact replay of a query-mode recording keeps polls in flight: a run of the same
query, each answered by a sample the engine took, with no other input between them, is sent in
one write and its answers read and parsed together (``ProfileElectrometer.read_charges``); each
sample is then checked and applied in its turn, as above.

Then it applies the input with ``Engine.apply``, as the daemon did: the logged sample (with the
row id of the line the replay wrote), a logged run of samples (through ``Engine.take_samples``,
the samples the driver read from the run's lines, which must give the logged digest and last
sample), the operator's actions, ticks that ended a wait, the
instrument lost or back, and a restart (a new engine resumes the session). Every input carries
the engine's clock as recorded, so nothing is decided on the replay's own clock, and nothing
is inferred from the session's effects.

A strict conductor (an exact replay) raises :class:`Divergence` at the first input that does not
fit. A what-if conductor (another plan) stops with :class:`WhatIfStop` where the plan no longer
fits the recording (an accept while the new plan still collects). Replaying a user's traffic
log, a sample that parses differently is noted and the new value is used (the comparison then
shows what it changed).
"""

from __future__ import annotations

import bisect
import dataclasses
import time
from collections import deque
from collections.abc import Callable
from typing import Any

from chargebook.acquire.engine import inputs, sample_log
from chargebook.acquire.engine.driver_commands import Command, SetBias
from chargebook.acquire.engine.engine import ConfirmationRequired, Engine
from chargebook.acquire.engine.states import IllegalTransition
from chargebook.acquire.protocol import EngineState as S
from chargebook.acquire.replay.recording import LoggedInput, RecordedLine, Recording
from chargebook.acquire.replay.traffic import TX, Divergence, TrafficFollower, TrafficLogError
from chargebook.corrections.errors import InputError
from chargebook.drivers_generic.interface import (
    Capability,
    InstrumentError,
    ProtocolError,
    Sample,
)

#: Longest wait for a line the playback must send, in wall seconds.
UNASKED_WAIT_S = 10.0
#: The fields of a logged sample that the driver's reading of its line must give again.
SAMPLE_FIELDS = ("t_s", "charge_nC", "complete", "status")
#: The most bytes of answers kept in flight at speed 0: the playback writes them all before
#: the driver reads any, so they must fit a pty's buffer (about 18 KiB each way on Linux).
MAX_BYTES_IN_FLIGHT = 4096


class WhatIfStop(Exception):
    """A what-if replay cannot go on: the recording holds nothing for what the plan asks."""


class Pacer:
    """Keeps the replay to the recorded pace divided by ``speed`` (0: no waiting at all)."""

    def __init__(
        self,
        speed: float,
        *,
        clock: Callable[[], float] = time.monotonic,
        sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        self.speed = speed
        self.clock = clock
        self.sleep = sleep
        self._anchor: tuple[float, float] | None = None  # (wall s, recorded s)

    def wait_until(self, recorded_t_s: float) -> None:
        """Sleep until the wall time that corresponds to ``recorded_t_s``."""
        if self.speed == 0:
            return
        if self._anchor is None:
            self._anchor = (self.clock(), recorded_t_s)
            return
        wall_s, anchor_s = self._anchor
        pause_s = wall_s + (recorded_t_s - anchor_s) / self.speed - self.clock()
        if pause_s > 0:
            self.sleep(pause_s)


class Conductor:
    """Runs the replay loop (see the module docstring) until the input log is used up.

    ``restart()`` returns a new engine for a logged restart; ``edited``: the lines are a
    user's traffic log, not the stored ones (a sample that parses differently is noted).
    """

    def __init__(
        self,
        engine: Engine,
        driver: Any,
        follower: TrafficFollower,
        recording: Recording,
        *,
        strict: bool,
        pacer: Pacer,
        actor: Callable[[str], str],
        restart: Callable[[], Engine],
        edited: bool = False,
        name_of: Callable[[str], str | None] | None = None,
    ) -> None:
        self.engine = engine
        self.driver = driver
        self.follower = follower
        self.recording = recording
        self.strict = strict
        self.pacer = pacer
        self.actor = actor
        self.restart = restart
        self.edited = edited
        self.name_of = name_of
        #: A what-if's engine commands not yet matched to a recorded line (see _what_if_line).
        self.pending: deque[Command] = deque()
        pushing = {Capability.STREAM, Capability.PUSH_READINGS}
        self.push = bool(driver.profile.capabilities & pushing)
        self.sample_lines = recording.sample_lines
        #: Polls may be kept in flight (:meth:`_poll_run`): an exact replay at speed 0 of a
        #: query-mode instrument, whose recording says what each poll was answered.
        self.in_flight = strict and pacer.speed == 0 and not self.push
        #: Where a logged input other than a sample is applied (lines played before it): a run
        #: of polls in flight ends before it.
        self.input_places = sorted({i.position for i in recording.inputs if i.line is None})
        #: What the driver read from each sample line: (its receive time on the driver's clock,
        #: the sample, the replay's row id of the line).
        self.read: dict[int, tuple[float, Sample, int | None]] = {}
        self.notes: list[str] = []

    # -- the loop ----------------------------------------------------------------------------
    def run(self) -> None:
        """Play every logged input at its place, and every recorded line; raise Divergence
        (strict) or WhatIfStop where they do not fit."""
        try:
            for logged in self.recording.inputs:
                self._play_to(logged.position)
                self._apply(logged)
            self._play_to(len(self.follower.lines))
            self.follower.flush()
        except Divergence as divergence:
            if self.strict:
                raise
            raise WhatIfStop(str(divergence)) from None

    def _play_to(self, position: int) -> None:
        """Play the recorded lines until ``position`` of them have been played."""
        lines = self.follower.lines
        while self.follower.position < min(position, len(lines)):
            line = lines[self.follower.position]
            self.pacer.wait_until(line.t_s)
            if line.direction == TX:
                self._send(line)
            else:
                self._receive(line)

    def _send(self, line: RecordedLine) -> None:
        """Send a recorded line; a poll whose answer the engine took is the driver's."""
        following = line.index + 1
        if following in self.sample_lines and not self.push:
            count = self._poll_run(line.index) if self.in_flight else 1
            if count > 1:
                self._read_run(line.index, count)
            else:
                self._read_sample(following, self.driver.read_charge)
            return
        text = self._what_if_line(self.follower.text(line))
        self._call(lambda: self.driver.transport.write_line(text))

    def _what_if_line(self, text: str) -> str:
        """Return the line to send where ``text`` was recorded: in a what-if replay, the
        engine's own rendering of the same command when it issued one (another bias: the
        follower notes the difference); else the recorded line."""
        name = self.name_of(text) if self.name_of is not None else None
        for index, command in enumerate(self.pending):
            if command.action == name:
                for _ in range(index + 1):  # the ones before it were never sent
                    self.pending.popleft()
                arguments = {"volts": command.bias_V} if isinstance(command, SetBias) else {}
                return self.driver.profile.command(name).render(**arguments)[0]
        return text

    def _receive(self, line: RecordedLine) -> None:
        """Read a recorded line that came unasked or as an answer."""
        if line.index in self.sample_lines:
            self._read_sample(line.index, lambda: self.driver.next_sample(UNASKED_WAIT_S))
            return
        got = self._call(lambda: self.driver.transport.read_line(UNASKED_WAIT_S))
        if got is None:
            raise Divergence(f"traffic line {line.index + 1} did not arrive from the playback")

    def _read_sample(self, index: int, read: Callable[[], Sample | None]) -> None:
        """Have the driver read the sample of line ``index``; keep what it parsed."""
        try:
            sample = read()
        except ProtocolError as error:
            raise self._unreadable(index, error) from None
        except InstrumentError as error:
            raise Divergence(
                f"traffic line {index + 1}, whose sample the engine took, could not be read "
                f"again: {error}"
            ) from None
        if sample is None or self.follower.position <= index:
            raise Divergence(f"traffic line {index + 1} did not arrive from the playback")
        self.read[index] = (sample.t_s, sample, self.follower.last_received_id)

    def _poll_run(self, index: int) -> int:
        """Return how many polls from line ``index`` on can be kept in flight: the recording
        has the same query answered, line after line, by a sample the engine took, with no
        other logged input applied between them (queries and answers of at most
        MAX_BYTES_IN_FLIGHT bytes each way)."""
        lines, samples = self.follower.lines, self.sample_lines
        query = lines[index].raw
        place = bisect.bisect_right(self.input_places, index)
        end = self.input_places[place] if place < len(self.input_places) else len(lines)
        size = max(len(query), len(lines[index + 1].raw))
        count = 1
        while True:
            sent = index + 2 * count
            if sent + 2 > end or lines[sent].raw != query or sent + 1 not in samples:
                break
            size += max(len(query), len(lines[sent + 1].raw))
            if size > MAX_BYTES_IN_FLIGHT:
                break
            count += 1
        return count

    def _read_run(self, index: int, count: int) -> None:
        """Have the driver read ``count`` polls from line ``index`` on, kept in flight; keep
        what it parsed from each answer, with the time the recording received it."""
        follower = self.follower
        follower.answered.clear()
        try:
            samples = self.driver.read_charges(count)
        except ProtocolError as error:
            raise self._unreadable(self._line_of(error, index, count), error) from None
        except InstrumentError as error:
            raise Divergence(
                f"traffic lines {index + 1} to {index + 2 * count}, whose samples the engine "
                f"took, could not be read again: {error}"
            ) from None
        answered = follower.answered
        if len(answered) != count or len(samples) != count:
            raise Divergence(f"traffic line {index + 2} did not arrive from the playback")
        lines = follower.lines
        for (line, row_id), sample in zip(answered, samples, strict=True):
            self.read[line] = (lines[line].t_s, sample, row_id)  # received as recorded

    def _line_of(self, error: ProtocolError, index: int, count: int) -> int:
        """Return the index of the answer among ``count`` polls from ``index`` that ``error``
        is about (the first answer when it names none of them)."""
        lines = self.follower.lines
        raw = error.line + self.driver.profile.framing.read_terminator
        answers = range(index + 1, index + 2 * count, 2)
        return next((i for i in answers if lines[i].raw == raw), index + 1)

    def _unreadable(self, index: int, error: ProtocolError) -> Exception:
        """Return why a sample line the driver cannot parse stops the replay: a traffic log
        that changed the line is refused, naming it; else the replay diverged."""
        original = self.recording.lines[index]
        played = self.follower.lines[index]
        if self.edited and original.raw != played.raw:
            return TrafficLogError(
                f"traffic log line {index + 1} for session {self.recording.session_id}: "
                f"{self.follower.text(played)!r} cannot be read by profile "
                f"{self.driver.profile.name} ({error}); the session recorded "
                f"{self.follower.text(original)!r} there"
            )
        return Divergence(
            f"traffic line {index + 1}, whose sample the engine took, cannot be read by "
            f"profile {self.driver.profile.name} ({error})"
        )

    def _call(self, call: Callable[[], Any]) -> Any:
        """Run a transport call; an instrument error (the playback did not answer as the
        recording says it did) is a divergence."""
        try:
            return call()
        except InstrumentError as error:
            raise Divergence(f"the playback did not follow the recording: {error}") from None

    # -- logged inputs -----------------------------------------------------------------------
    def _apply(self, logged: LoggedInput) -> None:
        given = logged.given
        if isinstance(given, inputs.Sample):
            given = self._sample_read_again(logged, given)
            if not self.engine.wants_samples():
                self._taken_too_early(logged)
        elif isinstance(given, inputs.SampleRun):
            self._take_run(logged, dataclasses.replace(given, actor=self.actor(given.actor)))
            return
        else:
            given = dataclasses.replace(given, actor=self.actor(given.actor))
        if isinstance(given, inputs.ShortDelivery):
            given = dataclasses.replace(given, reading=self._reading_again(given.reading))
        elif isinstance(given, inputs.Restart):
            self.engine = self.restart()
            self.pending.clear()
            self.driver.open()
        try:
            self.engine.apply(given)
        except (IllegalTransition, InputError, ConfirmationRequired) as error:
            raise self._does_not_fit(logged, given, error) from None
        self._after_input()

    def _does_not_fit(
        self, logged: LoggedInput, given: inputs.Input, error: Exception
    ) -> Exception:
        """Return the Divergence (strict) or WhatIfStop for a logged input the replayed engine
        refuses, naming it and why."""
        message = (
            f"the logged {given.kind.replace('_', ' ')} by {logged.given.actor} (input "
            f"{logged.input_id}, after traffic line {logged.position}) does not fit the "
            f"replayed engine: {error}{self._still_collecting()}"
        )
        return Divergence(message) if self.strict else WhatIfStop(message)

    def _after_input(self) -> None:
        """Forget the engine's commands (the recorded lines are what was sent); a what-if keeps
        them to render its own lines."""
        commands = self.engine.take_commands()
        if self.name_of is not None:
            profile_commands = self.driver.profile.commands
            self.pending.extend(c for c in commands if c.action in profile_commands)

    def _taken_too_early(self, logged: LoggedInput) -> None:
        """Say that the engine no longer takes samples where the recording logged one: the
        engine that recorded it was still taking a reading there (it logs no other sample), so
        the replayed engine ended it earlier. Divergence in an exact replay (noted for a user's
        traffic log); a what-if plan may well end it earlier (the comparison says so)."""
        assert logged.line is not None
        message = (
            f"the logged sample (input {logged.input_id}, traffic line {logged.line + 1}) came "
            "while the replayed engine was no longer taking a reading: it ended the reading "
            "earlier than the recording did"
        )
        if self.strict and not self.edited:
            raise Divergence(message)
        if self.strict:
            self.notes.append(message)

    def _reading_again(self, recorded_id: int) -> int:
        """Return the id of the replay's reading at the place of the recorded reading
        ``recorded_id`` (the id itself when the replay has no reading there yet: the engine
        then refuses the input by name)."""
        if recorded_id not in self.recording.reading_ids or self.engine.session_id is None:
            return recorded_id
        place = self.recording.reading_ids.index(recorded_id)
        replayed = self.engine.store.readings(self.engine.session_id)
        return replayed[place].id if place < len(replayed) else recorded_id

    def _sample_read_again(self, logged: LoggedInput, given: inputs.Sample) -> inputs.Sample:
        """Return the sample the driver read from the logged sample's line, with the row id
        the replay wrote it under; Divergence where it differs from the logged one (noted
        instead for a user's traffic log)."""
        assert logged.line is not None
        t_s, sample, line_id = self.read[logged.line]
        again = inputs.Sample(
            actor=self.actor(given.actor),
            clock_s=given.clock_s,
            t_s=t_s,
            charge_nC=sample.charge_nC,
            complete=sample.complete,
            status=sample.status.value,
            line_id=line_id,
        )
        if (again.t_s, again.charge_nC, again.complete, again.status) == (
            given.t_s,
            given.charge_nC,
            given.complete,
            given.status,
        ):
            return again  # the common case: the fields compared below, all equal
        self._compare(logged, [(name, getattr(given, name), getattr(again, name)) for name in
                               SAMPLE_FIELDS])  # fmt: skip
        return again

    def _take_run(self, logged: LoggedInput, given: inputs.SampleRun) -> None:
        """Give the engine the samples the driver read from a logged run's lines, as the daemon
        gave them; Divergence where they do not give the logged digest and last sample (noted
        instead for a user's traffic log), or where the engine ends a reading within the run
        (the daemon's did not: the run holds only samples that moved the charge)."""
        read = [self.read[index] for index in logged.lines]
        samples = [sample for _, sample, _ in read]
        line_ids = [line_id for _, _, line_id in read]
        clock_s = given.clock_s or 0.0  # logged with every run
        last = sample_log.sample_input(clock_s, samples[-1], None)
        self._compare(
            logged,
            [
                *((f"last sample's {name}", getattr(given, name), getattr(last, name))
                  for name in SAMPLE_FIELDS),
                ("digest", given.digest, inputs.run_digest(samples)),
            ],
        )  # fmt: skip
        engine, version, taken = self.engine, self.engine.data_version, 0
        while taken < len(samples) and engine.reading is not None:
            fed = engine.take_samples(samples[taken:], line_ids[taken:], clock_s, given.actor)
            if not fed:
                break
            taken += fed
        if self.strict and (taken < len(samples) or engine.data_version != version):
            raise Divergence(
                f"the logged run of {len(samples)} samples (input {logged.input_id}, traffic "
                f"lines {logged.lines[0] + 1} to {logged.lines[-1] + 1}) only moved the "
                "charge; the replayed engine "
                f"{'ended a reading' if engine.data_version != version else 'was not reading'} "
                f"within it, after {taken} of them"
            )
        self._after_input()

    def _compare(self, logged: LoggedInput, values: list[tuple[str, Any, Any]]) -> None:
        """Raise Divergence (noted instead for a user's traffic log) at the first of ``values``,
        each (name, logged, read again by the driver), that differs."""
        lines = f"traffic line {logged.lines[0] + 1}"
        if logged.count > 1:
            lines = f"traffic lines {logged.lines[0] + 1} to {logged.lines[-1] + 1}"
        what = "sample" if isinstance(logged.given, inputs.Sample) else "run of samples"
        for name, recorded, again in values:
            if again != recorded:
                message = (
                    f"the logged {what} (input {logged.input_id}, {lines}) has {name} = "
                    f"{recorded!r}; the driver read {again!r} from the played-back "
                    f"line{'s' if logged.count > 1 else ''}"
                )
                if not self.edited:
                    raise Divergence(message)
                self.notes.append(message)
                return

    def _still_collecting(self) -> str:
        """Return, when the engine is still taking a set, how far it got, in words."""
        engine = self.engine
        if engine.active is None or engine.state not in (S.SETTLING, S.COLLECTING):
            return ""
        step = engine.step
        assert step is not None  # a set is being taken: its step is current
        return (
            f"; the plan still collects step '{step.key}' after {engine.active.used_count} of "
            f"its {step.readings} readings: the recording holds no more readings for it"
        )
