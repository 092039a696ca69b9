"""The sequence engine: a plan's steps, one reading set at a time, as an explicit state machine.

Pure of I/O: operator actions and instrument samples go in (method calls), instrument commands
come out (:meth:`Engine.take_commands`), everything recorded goes to the store (committed before
the method returns, so before any client hears of it), and :meth:`Engine.snapshot` describes the
whole state. The clock is injected; the daemon (``chargebook.acquire.daemon.daemon``) runs the
driver, feeds samples and clock ticks in and executes the commands.

A *checkpoint* is the start of each reading set: a redo marks the current set superseded with
its reason and rewinds to the same step (the chamber bias is already where the step wants it),
a new attempt begins at the next arm. Stop, abort and pause are distinct: stop ends the session
as finished with the sets accepted so far; abort ends it as aborted; pause holds it (a reading in
progress is dropped and logged) until resume.

Time: a reading is captured only when a sample arrives, and its time is the receive time of
that sample (the ``t_s`` of one raw line of traffic, which the reading links to). Clock ticks only
end a settling wait. The clock is read when a reading is armed; that time is recorded with the
reading (``armed_t_s`` in its ``reading_recorded`` event). So everything the engine decided can
be decided again from the recorded traffic, the arming times and the operator's actions, which
is what a replay does (``chargebook.acquire.replay.session_replay``).

Restart: :meth:`Engine.restore` picks up the store's open session. A set that was collecting
when the daemon died is marked interrupted with its readings kept: the operator continues it
(arm) or redoes it, as after an instrument disconnect. A physicist expects both choices after a
crash: the readings taken are real, but only they can judge whether the chamber stayed settled.
A pause is not carried over a restart: the session comes back waiting, reviewing or interrupted.
"""

from __future__ import annotations

import datetime
import functools
import logging
import time
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, ParamSpec, TypeVar

from chargebook.acquire.engine import driver_commands
from chargebook.acquire.engine.capture import (
    Captured,
    CaptureSettings,
    ReadingCapture,
    capture_settings,
)
from chargebook.acquire.engine.driver_commands import Command
from chargebook.acquire.engine.states import ACTION_STATES, IllegalTransition, check_transition
from chargebook.acquire.protocol import EngineState, Method, ReadingPhase, Snapshot
from chargebook.acquire.record import events as ev
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import ReadingRow, SetRow, Store
from chargebook.acquire.session import rules
from chargebook.acquire.session.carried import MEASURED_BY, carried_metadata
from chargebook.acquire.session.evaluation import SessionContext, evaluate_session
from chargebook.acquire.session.plan import Plan, Step
from chargebook.acquire.session.register_rows import fill_from_registers
from chargebook.corrections.stability import Thresholds
from chargebook.drivers_generic.interface import Capability

log = logging.getLogger(__name__)
S = EngineState
P = ParamSpec("P")
R = TypeVar("R")

DAEMON_ACTOR = "daemon"
#: A session's results so far: (Evaluation.to_dict(), provisional?, why none could be computed).
Results = tuple[dict[str, Any] | None, bool, str | None]
#: A plan as the engine may be given it: a Plan, a shipped plan's name, a TOML path, a plan dict.
PlanSource = Plan | str | Path | Mapping[str, Any]
#: Settling readings taken at most while waiting for two consecutive readings to agree.
MAX_SETTLING_READINGS = 10


class ConfirmationRequired(Exception):
    """A destructive action (abort) was asked for without confirm=true."""


@dataclass
class ActiveSet:
    """The reading set being taken: its row id, step, attempt and readings so far."""

    id: int
    step_index: int
    attempt: int
    readings: list[ReadingRow] = field(default_factory=list)

    @property
    def settling_count(self) -> int:
        return sum(1 for r in self.readings if r.settling)

    @property
    def used_count(self) -> int:
        return sum(1 for r in self.readings if not r.settling)


def one_transaction(method: Callable[P, R]) -> Callable[P, R]:
    """Run an Engine input (an operator action, an instrument change, a tick that ends a wait)
    as one store transaction: all of its rows (set status, events, readings) or none.

    This is the one place the engine's transaction boundary is drawn. If the input fails
    part-way (an error, a commit the disk refuses), the store rolls the transaction back and
    the engine's own state is put back as it was before the input, so memory and record agree.
    Inputs nest (an action calling another is one transaction, the inner one a savepoint).
    """

    @functools.wraps(method)
    def run(*args: P.args, **kwargs: P.kwargs) -> R:
        engine = args[0]
        assert isinstance(engine, Engine)
        with engine.all_or_nothing():
            return method(*args, **kwargs)

    run.one_transaction = True  # type: ignore[attr-defined]  # checked by the tests
    return run


class Engine:
    """The sequence state machine over one store. See the module docstring."""

    def __init__(
        self,
        store: Store,
        *,
        capabilities: frozenset[Capability] | set[Capability] = frozenset(),
        bench: bool = False,
        clock: Callable[[], float] = time.monotonic,
        default_plan: PlanSource = "default",
        profile: str = "",
        time_scale: float = 1.0,
        thresholds: Thresholds | None = None,
        on_change: Callable[[], None] | None = None,
    ) -> None:
        self.store = store
        self.capabilities = frozenset(capabilities)
        self.bench = bench
        self.clock = clock
        self.default_plan = default_plan
        self.profile = profile
        self.time_scale = time_scale
        self.default_thresholds = thresholds or Thresholds()
        self.thresholds = self.default_thresholds
        self.on_change = on_change
        self.state = S.IDLE
        self.paused_from: EngineState | None = None
        self.session_id: int | None = None
        self.plan: Plan | None = None
        self.metadata: dict[str, Any] = {}
        self.step_index: int | None = None
        self.active: ActiveSet | None = None
        self.bias_V: float | None = None  # the chamber bias as last set or confirmed
        self.pending_manual: ev.ManualAction | None = None
        self.skipped: set[int] = set()
        self.reading: ReadingCapture | None = None
        self.settle_until_s: float | None = None
        self.instrument_connected = True
        self.instrument_message: str | None = None
        self.identity: str | None = None
        #: The driver's words on late or slow answers, or None while they come in good time.
        self.reply_note: str | None = None
        #: Why the station database cannot commit now ("record not writable: ..."), or None.
        self.record_fault: str | None = None
        self.reading_status = "ok"  # the instrument's status of the latest sample
        self.sample_line_id: int | None = None  # the raw line (traffic id) of the latest sample
        #: Words the operator must read about something the engine did on its own (a reading
        #: discarded by a pause), kept until the next reading is recorded or the set is closed.
        self.notice: str | None = None
        self.integration_s: dict[int, float] = {}  # reading id -> seconds from arm to capture
        self._commands: list[Command] = []
        self._results_cache: tuple[int, Results] | None = None
        self.seq = 0  # every snapshot
        self.data_version = 0  # every change of what is recorded or of the state

    # ------------------------------------------------------------------------ plumbing
    @property
    def step(self) -> Step | None:
        """Return the current plan step (None outside a session or after the last step)."""
        if self.plan is None or self.step_index is None:
            return None
        if 0 <= self.step_index < len(self.plan.steps):
            return self.plan.steps[self.step_index]
        return None

    def take_commands(self) -> list[Command]:
        """Return and forget the instrument commands issued since the last call."""
        commands, self._commands = self._commands, []
        return commands

    def _changed(self) -> None:
        self.seq += 1
        self.data_version += 1
        if self.on_change is not None:
            self.on_change()

    def set_record_fault(self, message: str | None) -> None:
        """Say why the record cannot commit (None: it can again); no action is taken meanwhile."""
        if message != self.record_fault:
            self.record_fault = message
            self.seq += 1

    def set_reply_note(self, note: str | None) -> None:
        """Show the driver's words on late or slow answers (None: they come in good time)."""
        if note != self.reply_note:
            self.reply_note = note
            self.seq += 1

    def touch_live(self) -> None:
        """Count a new snapshot for the reading in progress (results stay cached)."""
        self.seq += 1

    def _goto(
        self,
        new: EngineState,
        action: str,
        actor: str,
        *,
        set_id: int | None = None,
        wait_s: float | None = None,
        reason: str | None = None,
        next_step: int | None = None,
    ) -> None:
        check_transition(self.state, new, action)
        old = self.state
        self.state = new
        log.info("%s: %s -> %s", action, old.value, new.value)
        change: ev.StateChanged = {"from": old.value, "to": new.value, "action": action}
        if set_id is not None:
            change["set_id"] = set_id
        if wait_s is not None:
            change["wait_s"] = wait_s
        if reason is not None:
            change["reason"] = reason
        if next_step is not None:
            change["next_step"] = next_step
        self._event(actor, EventKind.STATE_CHANGED, change)

    def _event(self, actor: str, kind: EventKind, detail: Mapping[str, object]) -> None:
        if self.session_id is not None:
            self.store.add_event(self.session_id, actor, kind, detail)

    def _issue(self, command: Command) -> None:
        self._commands.append(command)

    def _can(self, capability: Capability) -> bool:
        return capability in self.capabilities

    @contextmanager
    def all_or_nothing(self) -> Iterator[None]:
        """Run the block as one store transaction; on an error, roll the record back and put
        the engine's state back as it was (see :func:`one_transaction`)."""
        saved = self._checkpoint()
        try:
            with self.store.atomic():
                yield
        except BaseException:
            self._restore_checkpoint(saved)
            raise

    def _checkpoint(self) -> tuple[dict[str, Any], dict[str, Any] | None, list[ReadingRow] | None]:
        """Return the engine's state, copied deep enough to be put back after a failed input."""
        state = {
            key: value.copy() if isinstance(value, list | dict | set) else value
            for key, value in vars(self).items()
        }
        reading = vars(self.reading).copy() if self.reading is not None else None
        readings = list(self.active.readings) if self.active is not None else None
        return state, reading, readings

    def _restore_checkpoint(
        self, saved: tuple[dict[str, Any], dict[str, Any] | None, list[ReadingRow] | None]
    ) -> None:
        state, reading, readings = saved
        vars(self).update(state)
        if self.reading is not None and reading is not None:  # the same object, as it was
            vars(self.reading).update(reading)
        if self.active is not None and readings is not None:
            self.active.readings = readings

    # -------------------------------------------------------------------------- guards
    def refusal(self, action: str) -> str | None:
        """Return why ``action`` is not legal now, in words, or None when it is."""
        states = ACTION_STATES.get(action)
        if states is None:
            return f"{action} is not an operator action"
        if self.record_fault is not None:
            return f"{self.record_fault}; nothing can be recorded until it is writable again"
        if self.state not in states:
            return f"it is not possible while the sequence is {self.state.value.replace('_', ' ')}"
        step = self.step
        if action == Method.STEP_ARM:
            if not self.instrument_connected:
                return "the electrometer is not connected"
            if self.state is S.WAITING_FOR_OPERATOR:
                assert self.session_id is not None  # waiting: a session is open
                if not self.store.environment(self.session_id):
                    return "enter the air temperature and pressure first (environment.set)"
                if self.pending_manual is not None:
                    return "the manual step must be confirmed first (step.manual_done)"
        if action == Method.STEP_MANUAL_DONE and self.pending_manual is None:
            return "no manual step is waiting"
        if action == Method.STEP_SKIP and not (step is not None and step.optional):
            return "only an optional step can be skipped"
        no_charge = self.reading is None or self.reading.last_charge_nC is None
        if action == Method.READING_CAPTURE and no_charge:
            return "no reading is in progress"
        return None

    def allowed(self) -> list[str]:
        """Return the operator actions that are legal now."""
        return [action for action in ACTION_STATES if self.refusal(action) is None]

    def _require(self, action: str) -> None:
        why = self.refusal(action)
        if why is not None:
            raise IllegalTransition(action, self.state, self.allowed(), why)

    # ----------------------------------------------------------------- session actions
    @one_transaction
    def start_session(
        self, metadata: dict[str, Any], plan: PlanSource | None = None, actor: str = DAEMON_ACTOR
    ) -> int:
        """Open a session with validated metadata and a plan; return its id."""
        self._require(Method.SESSION_START)
        resolved = rules.resolve_plan(plan if plan is not None else self.default_plan)
        today = self.store.stamp()[:10]
        filled = fill_from_registers(
            self.store,
            metadata,
            on=datetime.date.fromisoformat(today),
            validity_years=self.default_thresholds.certificate_validity_years,
        )
        checked = rules.validate_metadata(
            carried_metadata(self.store, rules.validate_metadata(filled), resolved, today)
        )
        session_id = self.store.create_session(
            metadata=checked,
            plan=resolved.to_dict(),
            convention=str(checked["convention"]),
            beam=str(checked["beam"]),
            actor=actor,
        )
        self.session_id, self.plan, self.metadata = session_id, resolved, checked
        self.skipped, self.active, self.bias_V = set(), None, None
        self.integration_s = {}
        self.thresholds = self.default_thresholds
        self._event(actor, EventKind.THRESHOLDS, asdict(self.thresholds))
        acquisition = ev.Acquisition(profile=self.profile, time_scale=self.time_scale)
        self._event(actor, EventKind.ACQUISITION, acquisition)
        carried = {k: checked[f"carried_{k}"] for k in MEASURED_BY if checked[f"carried_{k}"]}
        if carried:
            self._event(actor, EventKind.CARRIED_FACTORS, carried)
        if checked.get("subtract_leakage"):
            chosen = ev.LeakageSubtractionChosen(subtract_leakage=True)
            self._event(actor, EventKind.LEAKAGE_SUBTRACTION_CHOSEN, chosen)
        if self.identity is not None:
            identified = ev.InstrumentIdentified(identity=self.identity, profile=self.profile)
            self._event(DAEMON_ACTOR, EventKind.INSTRUMENT_IDENTIFIED, identified)
        self._goto(S.WAITING_FOR_OPERATOR, Method.SESSION_START, actor)
        self._enter_step(0, actor)
        self._changed()
        return session_id

    @one_transaction
    def set_environment(
        self,
        temperature_C: float,
        pressure: float,
        pressure_unit: str = "kPa",
        humidity_pct: float | None = None,
        source: str = "operator",
        actor: str = DAEMON_ACTOR,
    ) -> int:
        """Record an environment entry (°C, pressure in its unit, % RH) after range checks."""
        self._require(Method.ENVIRONMENT_SET)
        entry = rules.check_environment(temperature_C, pressure, pressure_unit, humidity_pct)
        assert self.session_id is not None
        entry_id = self.store.add_environment(self.session_id, source=source, **entry)
        entered = ev.EnvironmentEntered(environment_id=entry_id, source=source, **entry)
        self._event(actor, EventKind.ENVIRONMENT_ENTERED, entered)
        self._changed()
        return entry_id

    @one_transaction
    def manual_done(self, note: str | None = None, actor: str = DAEMON_ACTOR) -> None:
        """Record that the pending manual step was done by hand (who: ``actor``)."""
        self._require(Method.STEP_MANUAL_DONE)
        manual = self.pending_manual
        assert manual is not None
        done = ev.ManualStepDone(by_hand=True, note=note, **manual)
        self._event(actor, EventKind.MANUAL_STEP_DONE, done)
        if manual["action"] == "set_bias":
            self.bias_V = float(manual["volts"])
            changed = ev.BiasChanged(volts=self.bias_V, how="by hand")
            self._event(actor, EventKind.BIAS_CHANGED, changed)
            if self.bench:
                self._issue(driver_commands.TurnBiasSwitch(self.bias_V))
        self.pending_manual = None
        self._changed()

    @one_transaction
    def skip(self, actor: str = DAEMON_ACTOR) -> None:
        """Skip the current (optional) step."""
        self._require(Method.STEP_SKIP)
        assert self.step_index is not None and self.step is not None
        skipped = ev.StepSkipped(step_index=self.step_index, step_key=self.step.key)
        self._event(actor, EventKind.STEP_SKIPPED, skipped)
        self.skipped.add(self.step_index)
        self._advance(actor, Method.STEP_SKIP)
        self._changed()

    @one_transaction
    def arm(self, actor: str = DAEMON_ACTOR) -> None:
        """Start the current step's set (or continue an interrupted one)."""
        self._require(Method.STEP_ARM)
        if self.state is S.INTERRUPTED:
            assert self.active is not None
            self.store.set_set_status(
                self.active.id, "collecting", "continued after the interruption", actor=actor
            )
            self._apply_bias(actor)
            self._begin_reading(actor, Method.STEP_ARM)
            self._changed()
            return
        step, step_index = self.step, self.step_index
        assert step is not None and step_index is not None and self.session_id is not None
        attempt = 1 + sum(1 for s in self.store.sets(self.session_id) if s.step_index == step_index)
        set_id = self.store.add_set(
            self.session_id, step_index, step.key, step.purpose, step.polarity, step.bias_V, attempt
        )
        self.active = ActiveSet(set_id, step_index, attempt)
        self._apply_bias(actor)
        wait_s = rules.settling_wait_s(step) * self.time_scale
        if wait_s > 0:
            self.settle_until_s = self.clock() + wait_s
            self._goto(S.SETTLING, Method.STEP_ARM, actor, set_id=set_id, wait_s=wait_s)
        else:
            self._begin_reading(actor, Method.STEP_ARM)
        self._changed()

    @one_transaction
    def capture(self, actor: str = DAEMON_ACTOR) -> None:
        """Capture the charge integrated so far (as of the latest sample) as a manual reading."""
        self._require(Method.READING_CAPTURE)
        assert self.reading is not None and self.reading.last_t_s is not None
        captured = self.reading.capture_now(self.reading.last_t_s)
        if captured is not None:
            self._record(captured, actor)
        self._changed()

    @one_transaction
    def accept(self, actor: str = DAEMON_ACTOR) -> None:
        """Accept the reviewed set and go on to the next step (or finish)."""
        self._require(Method.SET_ACCEPT)
        assert self.active is not None
        self.store.set_set_status(self.active.id, "accepted", actor=actor)
        self.active = None
        self.notice = None
        self._advance(actor, Method.SET_ACCEPT)
        self._changed()

    @one_transaction
    def redo(self, reason: str, actor: str = DAEMON_ACTOR) -> None:
        """Mark the current set superseded with ``reason`` and rewind to the same step."""
        self._require(Method.SET_REDO)
        reason = rules.require_reason("reason", reason)
        self._drop_reading(actor, "redo")
        self.notice = None  # the operator chose to start the set again: nothing to repeat
        if self.active is not None:
            self.store.set_set_status(self.active.id, "superseded", reason, actor=actor)
        self.active = None
        self.settle_until_s = None
        self._goto(S.WAITING_FOR_OPERATOR, Method.SET_REDO, actor, reason=reason)
        self._changed()

    @one_transaction
    def pause(self, actor: str = DAEMON_ACTOR) -> None:
        """Hold the sequence; a reading in progress is dropped and logged."""
        self._require(Method.SESSION_PAUSE)
        self._drop_reading(actor, "pause")
        self.paused_from = self.state
        self._goto(S.PAUSED, Method.SESSION_PAUSE, actor)
        self._changed()

    @one_transaction
    def resume(self, actor: str = DAEMON_ACTOR) -> None:
        """Return to the state the session was paused from; re-arm a set that was collecting."""
        self._require(Method.SESSION_RESUME)
        target = self.paused_from or S.WAITING_FOR_OPERATOR
        self.paused_from = None
        if target in (S.SETTLING, S.COLLECTING) and not self.instrument_connected:
            target = S.INTERRUPTED
        if target in (S.SETTLING, S.COLLECTING):
            if self.settle_until_s is not None:
                wait_s = rules.settling_wait_s(self.step) * self.time_scale
                self.settle_until_s = self.clock() + wait_s
                self._goto(S.SETTLING, Method.SESSION_RESUME, actor)
            else:
                self._begin_reading(actor, Method.SESSION_RESUME)
        else:
            self._goto(target, Method.SESSION_RESUME, actor)
        self._changed()

    @one_transaction
    def stop(self, reason: str, actor: str = DAEMON_ACTOR) -> None:
        """End the session early as finished; a set not yet accepted is closed as aborted."""
        self._require(Method.SESSION_STOP)
        reason = rules.require_reason("reason", reason)
        self._close_session("finished", S.FINISHED, Method.SESSION_STOP, reason, actor)

    @one_transaction
    def abort(self, reason: str, confirm: bool = False, actor: str = DAEMON_ACTOR) -> None:
        """Abandon the session (needs confirm=True); everything recorded is kept."""
        self._require(Method.SESSION_ABORT)
        reason = rules.require_reason("reason", reason)
        if confirm is not True:
            raise ConfirmationRequired(
                "abort needs confirm = true: the session will end as aborted (nothing is deleted)"
            )
        self._close_session("aborted", S.ABORTED, Method.SESSION_ABORT, reason, actor)

    @one_transaction
    def close(self, actor: str = DAEMON_ACTOR) -> None:
        """Leave a finished or aborted session; the engine is idle again."""
        self._require(Method.SESSION_CLOSE)
        self._goto(S.IDLE, Method.SESSION_CLOSE, actor)
        self.session_id, self.plan, self.step_index, self.active = None, None, None, None
        self.metadata, self.pending_manual = {}, None
        self._changed()

    def _close_session(
        self, status: str, state: EngineState, action: str, reason: str, actor: str
    ) -> None:
        assert self.session_id is not None
        self._drop_reading(actor, action)
        self.notice = None  # the session is closed: nothing more to deliver
        if self.active is not None:
            self.store.set_set_status(self.active.id, "aborted", reason, actor=actor)
            self.active = None
        self.settle_until_s, self.paused_from, self.pending_manual = None, None, None
        self._goto(state, action, actor, reason=reason)
        self.store.set_session_status(self.session_id, status, reason, actor=actor)
        self._changed()

    # ---------------------------------------------------------------- instrument input
    def on_sample(
        self,
        t_s: float,
        charge_nC: float,
        complete: bool = False,
        status: str = "ok",
        *,
        line_id: int | None = None,
    ) -> None:
        """Take one sample from the instrument (charge in nC, receive time in s on the driver's
        clock; its raw line, row ``line_id``, is in the store before the sample reaches the
        engine). A reading names the raw line of the sample it was taken at."""
        reading = self.reading
        if reading is None:
            return
        before = vars(reading).copy(), self.reading_status
        self.reading_status = status
        if t_s >= reading.armed_t_s:  # a stale sample is ignored (see ReadingCapture.feed)
            self.sample_line_id = line_id
        captured = reading.feed(t_s, charge_nC, complete)
        if captured is None:
            return  # nothing recorded: no transaction for a sample that only moves the charge
        try:
            self._record_captured(captured)
        except BaseException:  # the sample is not taken: the next one may capture again
            vars(reading).update(before[0])
            self.reading_status = before[1]
            raise

    @one_transaction
    def _record_captured(self, captured: Captured) -> None:
        """Record a captured reading and all that follows from it in one transaction."""
        self._record(captured, DAEMON_ACTOR)
        self._changed()

    def tick(self, now_s: float | None = None) -> None:
        """End a settling wait that is over at ``now_s`` (s on the engine's clock).

        Readings are not captured here: the hold time and a timed integration end with the
        first sample received after them (see the module docstring).
        """
        now_s = self.clock() if now_s is None else now_s
        waiting = self.state is S.SETTLING and self.reading is None
        if waiting and self.settle_until_s is not None and now_s >= self.settle_until_s:
            self._end_settling_wait()

    @one_transaction
    def _end_settling_wait(self) -> None:
        """Begin the reading a settling wait held back, in one transaction."""
        self.settle_until_s = None
        self._begin_reading(DAEMON_ACTOR, "settling wait over")
        self._changed()

    @one_transaction
    def instrument_lost(self, message: str, *, still_connected: bool = False) -> None:
        """The electrometer went away (or failed a command, ``still_connected``): a set in
        progress becomes interrupted with its readings kept."""
        if not self.instrument_connected:
            return
        self.instrument_connected = still_connected
        self.instrument_message = message
        kind = EventKind.INSTRUMENT_FAULT if still_connected else EventKind.INSTRUMENT_LOST
        self._event(DAEMON_ACTOR, kind, ev.InstrumentMessage(message=message))
        busy = (S.SETTLING, S.COLLECTING)
        if self.state in busy or (self.state is S.PAUSED and self.paused_from in busy):
            self._drop_reading(DAEMON_ACTOR, "instrument lost")
            assert self.active is not None
            self.store.set_set_status(self.active.id, "interrupted", message)
            self.settle_until_s = None
            if self.state is S.PAUSED:
                self.paused_from = S.INTERRUPTED
            else:
                self._goto(S.INTERRUPTED, "instrument lost", DAEMON_ACTOR, reason=message)
        self._changed()

    def instrument_unreachable(self, message: str) -> None:
        """The electrometer cannot be reached yet (or again): show why, while it stays away."""
        if self.instrument_connected or message == self.instrument_message:
            return
        self.instrument_message = message
        self._changed()

    @one_transaction
    def instrument_back(self, identity: str | None = None) -> None:
        """The electrometer answers again (or for the first time); record who it says it is
        (``identity``, an ``instrument_identified`` event) with its return, in one transaction."""
        if identity:
            self.identity = identity
            detail = ev.InstrumentIdentified(identity=identity, profile=self.profile)
            # recorded outside any session too: a report finds the instrument of a session
            # started later from the station's latest identification
            self.store.add_event(
                self.session_id, DAEMON_ACTOR, EventKind.INSTRUMENT_IDENTIFIED, detail
            )
        if self.instrument_connected and self.instrument_message is None:
            self._changed()
            return
        self.instrument_connected, self.instrument_message = True, None
        self._event(DAEMON_ACTOR, EventKind.INSTRUMENT_BACK, ev.InstrumentBack(identity=identity))
        self._changed()

    def wants_samples(self) -> bool:
        """Return True while a reading is being integrated (the daemon then reads samples)."""
        return self.reading is not None

    # ------------------------------------------------------------------ sequence logic
    def _enter_step(self, index: int, actor: str) -> None:
        self.step_index = index
        self.pending_manual = None
        step = self.step
        if step is None:
            return
        if not self._can(Capability.SET_BIAS) and self.bias_V != step.bias_V:
            self.pending_manual = ev.ManualAction(action="set_bias", volts=float(step.bias_V))
        entered = ev.StepEntered(step_index=index, step_key=step.key)
        self._event(actor, EventKind.STEP_ENTERED, entered)

    def _advance(self, actor: str, action: str) -> None:
        assert self.step_index is not None and self.plan is not None
        following = self.step_index + 1
        if following >= len(self.plan.steps):
            self.step_index = following
            self._goto(S.FINISHED, action, actor)
            assert self.session_id is not None
            self.store.set_session_status(self.session_id, "finished", "plan complete", actor)
            return
        self._goto(S.WAITING_FOR_OPERATOR, action, actor, next_step=following)
        self._enter_step(following, actor)

    def _apply_bias(self, actor: str) -> None:
        step = self.step
        if self._can(Capability.SET_BIAS) and step is not None:
            self._issue(driver_commands.SetBias(float(step.bias_V)))
            if self.bias_V != step.bias_V:
                self.bias_V = float(step.bias_V)
                changed = ev.BiasChanged(volts=self.bias_V, how="remote")
                self._event(actor, EventKind.BIAS_CHANGED, changed)

    def _settling_needed(self) -> bool:
        assert self.active is not None and self.step is not None
        return rules.settling_needed(self.step, self.active.readings, MAX_SETTLING_READINGS)

    def _begin_reading(self, actor: str, action: str) -> None:
        step = self.step
        assert step is not None and self.active is not None and self.plan is not None
        settling = self._settling_needed()
        new_state = S.SETTLING if settling else S.COLLECTING
        if self.instrument_connected:
            self.instrument_message = None  # a fault the operator has seen and acted on
        if self.state is not new_state:
            self._goto(new_state, action, actor, set_id=self.active.id)
        zeroed = self._can(Capability.ZERO)
        timed_s = rules.timed_s(step)
        self.reading = ReadingCapture(
            capture_settings(self.plan, self.time_scale),
            self.clock(),
            None if timed_s is None else timed_s * self.time_scale,
            baseline_nC=0.0 if zeroed else None,
        )
        self.reading_status = "ok"
        if self._can(Capability.ZERO):
            self._issue(driver_commands.Zero())
        if self._can(Capability.INTEGRATE):
            self._issue(driver_commands.StartIntegration())
        if self.bench and float(step.mu_per_reading) > 0:
            self._issue(driver_commands.DeliverBeam(float(step.mu_per_reading)))

    def _drop_reading(self, actor: str, why: str) -> None:
        if self.reading is None:
            return
        dropped = ev.ReadingDropped(why=why, charge_nC=self.reading.last_charge_nC)
        self._event(actor, EventKind.READING_DROPPED, dropped)
        self.notice = dropped_reading_notice(self.reading.phase, self.reading.last_charge_nC, why)
        self.reading = None
        if self._can(Capability.INTEGRATE) and self.instrument_connected:
            self._issue(driver_commands.StopIntegration())

    def _record(self, captured: Captured, actor: str) -> None:
        step, active = self.step, self.active
        assert step is not None and active is not None and self.session_id is not None
        settling = self._settling_needed()
        assert self.reading is not None
        armed_t_s = self.reading.armed_t_s
        self.reading = None
        self.notice = None
        if self._can(Capability.INTEGRATE):
            self._issue(driver_commands.StopIntegration())
        reading_id = self.store.add_reading(
            self.session_id,
            active.id,
            len(active.readings) + 1,
            captured.t_s,
            captured.charge_nC,
            captured.capture.value,
            settling,
            self.reading_status,
            self.sample_line_id,  # the capture is at the latest sample (see capture.py)
        )
        active.readings = self.store.readings(self.session_id, active.id)
        self.integration_s[reading_id] = captured.integration_s
        recorded = ev.ReadingRecorded(
            reading_id=reading_id,
            set_id=active.id,
            charge_nC=captured.charge_nC,
            capture=captured.capture.value,
            settling=settling,
            integration_s=captured.integration_s,
            armed_t_s=armed_t_s,
        )
        self._event(actor, EventKind.READING_RECORDED, recorded)
        if self._settling_needed() or active.used_count < int(step.readings):
            self._begin_reading(actor, "reading recorded")
            return
        self.store.set_set_status(active.id, "reviewing", actor=actor)
        self._goto(S.REVIEWING, "set complete", actor, set_id=active.id)

    # ------------------------------------------------------------------------ restart
    @one_transaction
    def restore(self) -> bool:
        """Resume the store's open session, if any; return True when one was resumed."""
        row = self.store.open_session()
        if row is None:
            return False
        self.session_id, self.metadata = row.id, row.metadata()
        self.plan = rules.resolve_plan(row.plan())
        events = self.store.events(row.id)
        self.skipped = {
            e.detail()["step_index"] for e in events if e.kind == EventKind.STEP_SKIPPED
        }
        bias_events = [e.detail() for e in events if e.kind == EventKind.BIAS_CHANGED]
        if bias_events:
            self.bias_V = float(bias_events[-1]["volts"])
        self.integration_s = rules.integration_times(events)
        self.thresholds = rules.session_thresholds(events)
        sets = self.store.sets(row.id)
        done = {s.step_index for s in sets if s.status == "accepted"} | self.skipped
        index = next((i for i in range(len(self.plan.steps)) if i not in done), None)
        self.state = S.WAITING_FOR_OPERATOR
        resumed = ev.SessionResumed(step_index=index)
        self.store.add_event(row.id, DAEMON_ACTOR, EventKind.SESSION_RESUMED, resumed)
        if index is None:
            self.step_index = len(self.plan.steps)
            self._goto(S.FINISHED, "restore", DAEMON_ACTOR)
            self.store.set_session_status(row.id, "finished", "plan complete")
            self._changed()
            return True
        self._enter_step(index, DAEMON_ACTOR)
        open_set = _open_set(sets, index)
        if open_set is not None:
            self.active = ActiveSet(open_set.id, index, open_set.attempt)
            self.active.readings = self.store.readings(row.id, open_set.id)
            self.pending_manual = None
            if open_set.status == "collecting":
                reason = "the daemon restarted while the set was being collected"
                self.store.set_set_status(open_set.id, "interrupted", reason)
            restored = S.REVIEWING if open_set.status == "reviewing" else S.INTERRUPTED
            self.state = restored
            back = ev.StateRestored(to=restored.value, set_id=open_set.id)
            self._event(DAEMON_ACTOR, EventKind.STATE_RESTORED, back)
        self._changed()
        return True

    # ----------------------------------------------------------------------- snapshot
    def results(self) -> Results:
        """Return (Evaluation.to_dict() so far, provisional?, error), cached until a change."""
        if self._results_cache is not None and self._results_cache[0] == self.data_version:
            return self._results_cache[1]
        if self.session_id is None:
            value: Results = (None, False, None)
        else:
            assert self.plan is not None  # a session is open: its plan is known
            context = SessionContext(
                self.plan, self.metadata, self.thresholds, self.integration_s, self.time_scale
            )
            active_id = self.active.id if self.active is not None else None
            found = evaluate_session(self.store, self.session_id, context, active_id)
            value = (found.results(), found.provisional, found.error)
        self._results_cache = (self.data_version, value)
        return value

    def snapshot(self) -> Snapshot:
        """Return the whole state as the protocol's Snapshot."""
        from chargebook.acquire.engine.snapshot import build_snapshot

        return build_snapshot(self)

    @property
    def live_phase(self) -> ReadingPhase:
        return self.reading.phase if self.reading is not None else ReadingPhase.IDLE


def dropped_reading_notice(phase: ReadingPhase, charge_nC: float | None, why: str) -> str:
    """Return what the operator must be told when a reading in progress is discarded."""
    cause = {
        "pause": "the session was paused",
        "redo": "the set was redone",
        "instrument lost": "the electrometer was lost",
    }.get(why, why)
    if phase in (ReadingPhase.RISING, ReadingPhase.HOLDING) or (charge_nC or 0.0) != 0.0:
        so_far = f" ({charge_nC:+.4f} nC so far)" if charge_nC is not None else ""
        return (
            f"The reading in progress{so_far} was discarded because {cause}: it is not recorded "
            "as a reading. Deliver that beam again."
        )
    return f"The armed reading was cancelled because {cause}; no beam had been seen."


def _open_set(sets: list[SetRow], step_index: int) -> SetRow | None:
    candidates = [
        s
        for s in sets
        if s.step_index == step_index and s.status in ("collecting", "reviewing", "interrupted")
    ]
    return candidates[-1] if candidates else None


__all__ = [
    "DAEMON_ACTOR",
    "CaptureSettings",
    "Command",
    "ConfirmationRequired",
    "Engine",
    "IllegalTransition",
]
