"""The replay's loop: the recorded traffic, line by line, through the real driver and engine.

The daemon decides from the wall clock when to poll the electrometer and hears the operator
whenever they act. A replay must make every one of those moments the same, so the
:class:`Conductor` takes them from the recording instead: it walks the recorded lines in order
and, for each,

* a poll (the profile's read command): polls through the driver and gives the sample to the
  engine if the daemon would have (a reading is armed, every command the engine issued has
  been sent, and the line came after the last command's answer); otherwise the sample was
  stale, as it was for the daemon, and is dropped;
* any other command: sends the engine's next command through the driver (it must be the one
  recorded); the profile's identify command is sent as the daemon does after a reconnection;
* a line the instrument sent unasked (push mode): reads it through the driver, as above;

and applies each recorded input (the operator's actions, the instrument lost or back, the
daemon restarting) after the lines recorded before it. Nothing is skipped: a line the engine
did not want is still sent and read, so the simulated instrument stays in step.

A strict conductor (an exact replay) raises :class:`Divergence` at the first line or input that
does not fit. A what-if conductor (another plan) accepts a command sent with other values
(another bias), and stops with :class:`WhatIfStop` where the recording holds nothing for what
the plan asks (a reading more than was taken).
"""

from __future__ import annotations

import bisect
import logging
import math
import time
from collections import deque
from collections.abc import Callable, Sequence
from typing import Any

from chargebook.acquire.engine.driver_commands import BENCH_COMMANDS, Command, SetBias
from chargebook.acquire.engine.engine import ConfirmationRequired, Engine
from chargebook.acquire.engine.states import IllegalTransition
from chargebook.acquire.protocol import EngineState as S
from chargebook.acquire.replay.recording import RecordedInput, RecordedLine
from chargebook.acquire.replay.traffic import TX, Divergence, TrafficFollower, TrafficLogError
from chargebook.corrections.errors import InputError
from chargebook.drivers_generic.interface import (
    Capability,
    InstrumentError,
    ProtocolError,
    Sample,
)

log = logging.getLogger(__name__)

#: Longest wait for a line the playback must send unasked, in wall seconds.
UNASKED_WAIT_S = 10.0
#: Inputs that drop a reading under way.
DROPPING_INPUTS = ("pause", "redo", "stop", "abort", "instrument_lost", "instrument_fault")


#: What a driver call returns in a replay when the instrument refused it or a line was garbled.
FAILED = object()


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


class ArmingClock:
    """The engine's clock in a replay: the time the original armed a reading, read where the
    replay arms one at the same point of the traffic.

    The engine reads its clock when it arms a reading (and to start a settling wait). In the
    original, a reading was armed after the lines played so far (``played``: the latest one's
    time, -inf before any) and before the command that started its integration (``until``: the
    time of the next recorded start command). The clock reads the original arming time in that
    window, or, where the original armed nothing there (a what-if plan arms elsewhere),
    ``otherwise`` (the time of the latest line).
    """

    def __init__(
        self,
        armed_times_s: Sequence[float],
        played: Callable[[], float],
        until: Callable[[], float],
        otherwise: Callable[[], float],
    ) -> None:
        self.armed_times_s = sorted(armed_times_s)
        self.played = played
        self.until = until
        self.otherwise = otherwise

    def __call__(self) -> float:
        index = bisect.bisect_left(self.armed_times_s, self.played())
        if index < len(self.armed_times_s) and self.armed_times_s[index] < self.until():
            return self.armed_times_s[index]
        return self.otherwise()


class Conductor:
    """Runs the replay loop (see the module docstring) until the recording is used up."""

    def __init__(
        self,
        engine: Engine,
        driver: Any,
        follower: TrafficFollower,
        inputs: Sequence[RecordedInput],
        *,
        strict: bool,
        pacer: Pacer,
        actor: Callable[[str], str],
        original_lines: Sequence[RecordedLine] | None = None,
        session_id: int | None = None,
        restart: Callable[[], Engine] | None = None,
        captured_times_s: frozenset[float] = frozenset(),
    ) -> None:
        self.engine = engine
        self.restart = restart
        self.captured_times_s = captured_times_s
        self.driver = driver
        self.follower = follower
        self.inputs = list(inputs)
        self.strict = strict
        self.pacer = pacer
        self.actor = actor
        self.original_lines = original_lines
        self.session_id = session_id
        profile = driver.profile
        self.push = bool(profile.capabilities & {Capability.STREAM, Capability.PUSH_READINGS})
        self.poll_line = _first_line(profile, "read")
        self.identify_line = _first_line(profile, "identify")
        self.pending: deque[Command] = deque()
        self.fresh_after_s = -math.inf
        self._next_input = 0

    # -- the loop ----------------------------------------------------------------------------
    def run(self) -> None:
        """Play every recorded line and input; raise Divergence (strict) or WhatIfStop where
        they do not fit."""
        try:
            self._play()
        except Divergence as divergence:
            if self.strict:
                raise
            raise WhatIfStop(str(divergence)) from None

    def _play(self) -> None:
        lines = self.follower.lines
        while True:
            self._apply_inputs(self.follower.position)
            if self.follower.finished:
                break
            line = lines[self.follower.position]
            self.pacer.wait_until(line.t_s)
            self._end_settling_wait()
            if line.direction == TX:
                self._send(line)
            else:
                self._read_unasked(line)
        self._apply_inputs(len(lines))
        self._take_commands()
        if self.pending and self.strict:
            wanted = ", ".join(c.action for c in self.pending)
            raise Divergence(
                f"the recording ends ({len(lines)} lines) while the replayed engine still wants "
                f"to send: {wanted}"
            )

    def _send(self, line: RecordedLine) -> None:
        text = self.follower.text(line)
        self._take_commands()
        if self._unanswered(line, text):
            self._send_unanswered(text)
        elif text == self.poll_line:
            self._offer(self._call(self.driver.read_charge))
        elif text == self.identify_line:
            self._call(self.driver.identify)
        elif self.pending:
            self._execute(self.pending.popleft())
        else:
            self._unwanted_command(line, text)

    def _unanswered(self, line: RecordedLine, text: str) -> bool:
        """Return True when the original got no answer to a line that asks for one (it timed
        out, or the cable was pulled while it was being sent)."""
        lines = self.follower.lines
        if line.index + 1 < len(lines) and lines[line.index + 1].direction != TX:
            return False
        confirmation = self.driver.profile.confirmation
        queries = (self.poll_line, self.identify_line, getattr(confirmation, "error_query", None))
        return confirmation.style == "ack" or text in queries

    def _send_unanswered(self, text: str) -> None:
        """Send a line as the original did, without waiting for the answer it never got."""
        if self.pending and text not in (self.poll_line, self.identify_line):
            command = self.pending.popleft()  # the engine's, sent as the wire went away
            wanted = _command_lines(self.driver.profile, command)
            if text not in wanted:
                raise Divergence(
                    f"the original sent {text!r} (unanswered) where the replayed engine wanted "
                    f"to send {wanted[0]!r}"
                )
        self._call(lambda: self.driver.transport.write_line(text))

    def _unwanted_command(self, line: RecordedLine, text: str) -> None:
        """The original sent a command the replayed engine does not want now."""
        state = self.engine.state.value.replace("_", " ")
        message = (
            f"at traffic line {line.index + 1} the original sent {text!r}; the replayed engine "
            f"had nothing to send (it is {state})"
        )
        if self.strict:
            raise Divergence(message)
        if self.engine.wants_samples():
            raise WhatIfStop(
                f"{message}: the original ended this reading while the plan still collects it"
            )
        self._call(lambda: self.driver.transport.write_line(text))
        self._read_answer(line)

    def _read_answer(self, line: RecordedLine) -> None:
        """Read the recorded answer lines to a command sent as recorded (what-if only)."""
        while (
            not self.follower.finished
            and self.follower.lines[self.follower.position].direction != TX
        ):
            answer = self._call(lambda: self.driver.transport.read_line(UNASKED_WAIT_S))
            if answer is None or answer is FAILED:
                raise WhatIfStop(f"no answer arrived to traffic line {line.index + 1}")

    # -- samples -----------------------------------------------------------------------------
    def _read_unasked(self, line: RecordedLine) -> None:
        if not self.push:
            raise Divergence(
                f"at traffic line {line.index + 1} the original received "
                f"{self.follower.text(line)!r} unasked, which a query-mode driver never reads"
            )
        while self.follower.position <= line.index:
            sample = self._call(lambda: self.driver.next_sample(UNASKED_WAIT_S))
            if sample is None and self.follower.position <= line.index:
                raise Divergence(f"traffic line {line.index + 1} did not arrive from the playback")
            self._offer(sample)

    def _offer(self, sample: object) -> None:
        """Give the engine a sample the daemon would have given it (see the module docstring)."""
        self._take_commands()
        if not isinstance(sample, Sample) or self.pending or not self.engine.wants_samples():
            return
        if sample.t_s < self.fresh_after_s or self._maybe_dropped(sample):
            return
        self.engine.on_sample(
            sample.t_s,
            sample.charge_nC,
            sample.complete,
            sample.status.value,
            line_id=self.follower.last_received_id,
        )
        self._take_commands()

    def _maybe_dropped(self, sample: Sample) -> bool:
        """Return True for a sample the daemon may have dropped: the last one before an input
        that drops the reading (pause, redo, stop, abort, the instrument lost). Written before
        that input, it may have reached the engine after it; then it was stale. An exact
        replay gives it to the engine only if the original took a reading from it (had the
        engine had it and not taken a reading, the reading was dropped anyway)."""
        if not self.strict or self._next_input >= len(self.inputs):
            return False
        upcoming = self.inputs[self._next_input]
        return (
            upcoming.kind in DROPPING_INPUTS
            and upcoming.position <= self.follower.position
            and sample.t_s not in self.captured_times_s
        )

    # -- commands ----------------------------------------------------------------------------
    def _take_commands(self) -> None:
        for command in self.engine.take_commands():
            if isinstance(command, BENCH_COMMANDS):
                continue  # the bench is not replayed: the recorded lines are the instrument
            if not self.engine.instrument_connected:
                log.info("instrument away: dropped command %s (as the daemon does)", command)
                continue
            self.pending.append(command)

    def _execute(self, command: Command) -> None:
        driver = self.driver
        calls: dict[str, Callable[[], Any]] = {
            "zero": driver.zero,
            "start": driver.start_integration,
            "stop": driver.stop_integration,
            "set_bias": lambda: driver.set_bias(_bias_V(command)),
        }
        if self._call(calls[command.action]) is not FAILED:
            self.fresh_after_s = self.follower.last_t_s  # as the daemon, after a command done

    def _call(self, call: Callable[[], Any]) -> Any:
        """Run a driver call and return its result, or FAILED: an instrument error is logged
        (the recorded inputs say what the daemon made of it), a line the original read but
        this log garbles is refused."""
        try:
            return call()
        except ProtocolError as error:
            self._rejected(error)
        except InstrumentError as error:
            log.info("replayed instrument error (as recorded): %s", error)
        return FAILED

    def _rejected(self, error: ProtocolError) -> None:
        """A line could not be read: fine if the original line was the same, else refuse."""
        index = self._index_of(error.line)
        original = self.original_lines
        if original is None or index < 0 or original[index].raw == self.follower.lines[index].raw:
            log.info("replayed a line the daemon also rejected: %s", error)
            return
        raise TrafficLogError(
            f"traffic log line {index + 1} for session {self.session_id}: "
            f"{self.follower.text(self.follower.lines[index])!r} cannot be read by profile "
            f"{self.driver.profile.name} ({error}); the session recorded "
            f"{self.follower.text(original[index])!r} there"
        )

    def _index_of(self, raw: bytes) -> int:
        """Return the index of the latest line seen that begins with ``raw`` (-1: none)."""
        for index in range(self.follower.position - 1, -1, -1):
            if self.follower.lines[index].raw.startswith(raw):
                return index
        return -1

    # -- recorded inputs ---------------------------------------------------------------------
    def _apply_inputs(self, position: int) -> None:
        while self._next_input < len(self.inputs):
            recorded = self.inputs[self._next_input]
            if recorded.position > position:
                return
            self._next_input += 1
            self.follower.input_position = recorded.position
            try:
                self._apply(recorded)
            except (IllegalTransition, InputError, ConfirmationRequired) as error:
                message = (
                    f"the recorded {recorded.kind.replace('_', ' ')} by {recorded.actor} (event "
                    f"{recorded.event_id}, after traffic line {recorded.position}) does not fit "
                    f"the replayed engine: {error}{self._still_collecting()}"
                )
                if self.strict:
                    raise Divergence(message) from None
                raise WhatIfStop(message) from None
            finally:
                self.follower.input_position = None
            self._take_commands()

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

    def _apply(self, recorded: RecordedInput) -> None:
        engine, detail = self.engine, recorded.detail
        actor = self.actor(recorded.actor)
        calls: dict[str, Callable[[], Any]] = {
            "environment": lambda: engine.set_environment(
                detail["temperature_C"],
                detail["pressure_entered"],
                detail["pressure_unit"],
                detail.get("humidity_pct"),
                detail.get("source", "operator"),
                actor=actor,
            ),
            "arm": lambda: engine.arm(actor=actor),
            "manual_done": lambda: engine.manual_done(detail.get("note"), actor=actor),
            "skip": lambda: engine.skip(actor=actor),
            "capture": lambda: engine.capture(actor=actor),
            "accept": lambda: engine.accept(actor=actor),
            "redo": lambda: engine.redo(detail["reason"], actor=actor),
            "pause": lambda: engine.pause(actor=actor),
            "resume": lambda: engine.resume(actor=actor),
            "stop": lambda: engine.stop(detail["reason"], actor=actor),
            "abort": lambda: engine.abort(detail["reason"], confirm=True, actor=actor),
            "close": lambda: engine.close(actor=actor),
            "instrument_lost": lambda: self._lost(detail["message"]),
            "instrument_fault": lambda: engine.instrument_lost(
                detail["message"], still_connected=True
            ),
            "instrument_back": lambda: engine.instrument_back(detail.get("identity")),
            "restart": self._restart,
        }
        calls[recorded.kind]()

    def _lost(self, message: str) -> None:
        """The instrument went away here: the daemon drops what it had queued for it."""
        self.pending.clear()
        self.engine.instrument_lost(message)

    def _restart(self) -> None:
        """The daemon restarted here: a new engine resumes the session, the port is reopened,
        and what the old daemon had queued is gone with it."""
        if self.restart is None:
            raise Divergence("the daemon restarted during the session and no restart is set up")
        self.pending.clear()
        self.fresh_after_s = -math.inf
        self.engine = self.restart()
        self._call(self.driver.open)

    def _end_settling_wait(self) -> None:
        """A settling wait the original was in is over by the next recorded line."""
        engine = self.engine
        waiting = engine.state is S.SETTLING and engine.reading is None
        if waiting and engine.settle_until_s is not None:
            engine.tick(engine.settle_until_s)
            self._take_commands()


def _command_lines(profile: Any, command: Command) -> list[str]:
    """Return the lines the profile sends for an engine command."""
    arguments = {"volts": command.bias_V} if isinstance(command, SetBias) else {}
    return profile.command(command.action).render(**arguments)


def _bias_V(command: Command) -> float:
    """Return the bias a SetBias command sets, V (signed)."""
    assert isinstance(command, SetBias)
    return command.bias_V


def _first_line(profile: Any, name: str) -> str | None:
    """Return the line the profile sends for command ``name`` (one without arguments)."""
    if name not in profile.commands or profile.command(name).arguments:
        return None
    return profile.command(name).templates[0]
