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

import dataclasses
import datetime
import logging
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field
from typing import Any

from chargebook.acquire.engine import driver_commands, inputs, sample_log
from chargebook.acquire.engine.capture import (
    Captured,
    CaptureKind,
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
from chargebook.corrections.delivered_mu import check_actual_MU
from chargebook.corrections.errors import InputError
from chargebook.corrections.stability import Thresholds
from chargebook.drivers_generic.interface import Capability

log = logging.getLogger(__name__)
S = EngineState

DAEMON_ACTOR = inputs.DAEMON_ACTOR
#: What an input's handler returns when the input changed nothing (so nothing is logged).
UNCHANGED = object()
#: A session's results so far: (Evaluation.to_dict(), provisional?, why none could be computed).
Results = tuple[dict[str, Any] | None, bool, str | None]
#: A plan as the engine may be given it (see :mod:`inputs`).
PlanSource = inputs.PlanSource
#: Settling readings taken at most while waiting for two consecutive readings to agree.
MAX_SETTLING_READINGS = 10
#: Why a reading is dropped when an auto-reset instrument reset itself without the completed
#: reading reaching the engine (the ``why`` of its ``reading_dropped`` event).
LOST_READING = "completed reading lost"


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
        self.actual_MU: dict[int, float] = {}  # reading id -> MU delivered, when stopped short
        #: Samples taken since the last input logged, logged with the next one (in order), as
        #: each call took them (see :mod:`sample_log`).
        self._unlogged_samples: list[sample_log.Chunk] = []
        #: How many samples the latest :meth:`take_samples` took (so far, if it raised).
        self.samples_taken = 0
        self._input_clock_s: float | None = None  # the clock of the input being applied
        self._run = 0  # counts the armings of the instrument (see sampling_run)
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

    @property
    def sampling_run(self) -> int | None:
        """Return the arming the reading in progress takes its samples from (None: no reading).

        Each arming of the instrument (zero, start) begins a new one. An auto-reset
        instrument's next reading in a set continues it: it takes the samples that follow the
        one that completed the reading before, and nothing is sent to the instrument between.
        """
        return None if self.reading is None else self._run

    def take_commands(self) -> list[Command]:
        """Return and forget the instrument commands issued since the last call."""
        commands, self._commands = self._commands, []
        return commands

    def _changed(self) -> None:
        self.seq += 1
        self.data_version += 1
        if self.on_change is not None:
            self.on_change()

    def record_changed(self) -> None:
        """Count a change recorded beside the engine (a calibration visit's), for a new
        snapshot."""
        self._changed()

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
        the engine's state back as it was (see :meth:`apply`)."""
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

    # -------------------------------------------------------------------------- inputs
    def apply(self, given: inputs.Input) -> Any:
        """Apply one input: the only way the engine's state changes. Return what its handler
        returns (a new session's id, an environment entry's id, or None).

        An input that changes the session runs as one store transaction with the input logged
        in it (table ``inputs``), beside all of its effects: all of them or none. If it fails
        part-way (an error, a commit the disk refuses), the store rolls the transaction back
        and the engine's own state is put back as it was before the input, so memory and
        record agree. An input refused (an illegal action, bad values) raises and
        leaves nothing. Samples that only move the charge and ticks that end no wait write
        nothing; a sample is logged with the next input that writes.
        """
        if given.clock_s is None:
            given = dataclasses.replace(given, clock_s=self.clock())
        assert given.clock_s is not None
        if isinstance(given, inputs.Sample):
            return self._take_sample(given)
        if isinstance(given, inputs.SampleRun):
            raise TypeError(
                "a logged run of samples is taken with Engine.take_samples, given the samples "
                "its traffic lines hold"
            )
        if isinstance(given, inputs.Tick) and not self._wait_over(given.clock_s):
            return None
        handler = HANDLERS[type(given)]
        return self._in_transaction(given, lambda: handler(self, given))

    def _in_transaction(self, given: inputs.Input, handle: Callable[[], Any]) -> Any:
        """Run ``handle`` for ``given`` in one transaction and log ``given`` with its effects
        (not when it returns UNCHANGED: then nothing was recorded, and None is returned)."""
        session_id = self.session_id
        with self.all_or_nothing():
            self._input_clock_s = given.clock_s
            try:
                result = handle()
            finally:
                self._input_clock_s = None
            if result is UNCHANGED:
                return None
            self._log(session_id if session_id is not None else self.session_id, given)
        return result

    def _log(self, session_id: int | None, given: inputs.Input) -> None:
        """Append ``given`` to the input log, after the samples taken before it."""
        entries = (
            sample_log.logged_entries(self._unlogged_samples) if session_id is not None else []
        )
        entries.append((given.kind, given.actor, given.fields()))
        self.store.add_inputs(session_id, entries)
        self._unlogged_samples = []

    def _now(self) -> float:
        """Return the engine's clock: the one of the input being applied (s)."""
        return self.clock() if self._input_clock_s is None else self._input_clock_s

    # The operator's actions and the daemon's inputs, by name: each builds its input and
    # applies it (see :mod:`chargebook.acquire.engine.inputs` for what each does).
    def start_session(
        self,
        metadata: dict[str, Any],
        plan: PlanSource | None = None,
        actor: str = DAEMON_ACTOR,
        mu_per_reading: float | None = None,
    ) -> int:
        """Open a session with validated metadata and a plan (MU per reading as chosen, or
        the plan's when None); return its id."""
        started = inputs.StartSession(
            metadata=metadata, plan=plan, actor=actor, mu_per_reading=mu_per_reading
        )
        session_id: int = self.apply(started)
        return session_id

    def record_short_delivery(
        self, reading_id: int, actual_MU: float, reason: str, actor: str = DAEMON_ACTOR
    ) -> None:
        """Record that a reading's delivery stopped short at ``actual_MU``, for ``reason``."""
        self.apply(
            inputs.ShortDelivery(
                reading=reading_id, actual_MU=actual_MU, reason=reason, actor=actor
            )
        )

    def set_environment(
        self,
        temperature_C: float,
        pressure: float,
        pressure_unit: str = "kPa",
        humidity_pct: float | None = None,
        source: str = "operator",
        actor: str = DAEMON_ACTOR,
    ) -> int:
        """Record an environment entry (°C, pressure in its unit, % RH); return its id."""
        entry = inputs.EnterEnvironment(
            temperature_C=temperature_C,
            pressure=pressure,
            pressure_unit=pressure_unit,
            humidity_pct=humidity_pct,
            source=source,
            actor=actor,
        )
        entry_id: int = self.apply(entry)
        return entry_id

    def manual_done(self, note: str | None = None, actor: str = DAEMON_ACTOR) -> None:
        self.apply(inputs.ManualDone(note=note, actor=actor))

    def skip(self, actor: str = DAEMON_ACTOR) -> None:
        self.apply(inputs.Skip(actor=actor))

    def arm(self, actor: str = DAEMON_ACTOR) -> None:
        self.apply(inputs.Arm(actor=actor))

    def capture(self, actor: str = DAEMON_ACTOR) -> None:
        self.apply(inputs.Capture(actor=actor))

    def accept(self, actor: str = DAEMON_ACTOR) -> None:
        self.apply(inputs.Accept(actor=actor))

    def redo(self, reason: str, actor: str = DAEMON_ACTOR) -> None:
        self.apply(inputs.Redo(reason=reason, actor=actor))

    def pause(self, actor: str = DAEMON_ACTOR) -> None:
        self.apply(inputs.Pause(actor=actor))

    def resume(self, actor: str = DAEMON_ACTOR) -> None:
        self.apply(inputs.Resume(actor=actor))

    def stop(self, reason: str, actor: str = DAEMON_ACTOR) -> None:
        self.apply(inputs.Stop(reason=reason, actor=actor))

    def abort(self, reason: str, confirm: bool = False, actor: str = DAEMON_ACTOR) -> None:
        self.apply(inputs.Abort(reason=reason, confirm=confirm, actor=actor))

    def close(self, actor: str = DAEMON_ACTOR) -> None:
        self.apply(inputs.Close(actor=actor))

    def on_sample(
        self,
        t_s: float,
        charge_nC: float,
        complete: bool = False,
        status: str = "ok",
        *,
        line_id: int | None = None,
    ) -> None:
        """Give the engine one sample (see :class:`inputs.Sample`)."""
        sample = inputs.Sample(
            t_s=t_s, charge_nC=charge_nC, complete=complete, status=status, line_id=line_id
        )
        self.apply(sample)

    def tick(self, now_s: float | None = None) -> None:
        """End a settling wait that is over at ``now_s`` (s on the engine's clock)."""
        self.apply(inputs.Tick(clock_s=now_s))

    def instrument_lost(self, message: str, *, still_connected: bool = False) -> None:
        self.apply(inputs.InstrumentLost(message=message, still_connected=still_connected))

    def instrument_back(self, identity: str | None = None) -> None:
        self.apply(inputs.InstrumentBack(identity=identity))

    def restore(self) -> bool:
        """Resume the store's open session, if any; return True when one was resumed."""
        return self.apply(inputs.Restart()) is True

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
        if action == Method.READING_CAPTURE:
            if self.reading is None:
                return "no reading is in progress"
            if self.reading.last_charge_nC is None:
                return "the reading in progress has no charge yet: capture once one has come"
        return None

    def allowed(self) -> list[str]:
        """Return the operator actions that are legal now."""
        return [action for action in ACTION_STATES if self.refusal(action) is None]

    def _require(self, action: str) -> None:
        why = self.refusal(action)
        if why is not None:
            raise IllegalTransition(action, self.state, self.allowed(), why)

    # ----------------------------------------------------------------- session actions
    def _on_start_session(self, given: inputs.StartSession) -> int:
        """Open a session with validated metadata and a plan; return its id.

        ``given.mu_per_reading``: the MU per reading the operator chose in the setup for the
        plan's compared steps (routine, opposite, reduced, return check), instead of the plan's.
        """
        metadata, plan, actor = given.metadata, given.plan, given.actor
        self._require(Method.SESSION_START)
        resolved = rules.resolve_plan(plan if plan is not None else self.default_plan)
        planned_mu = resolved.result_mu_per_reading()
        if given.mu_per_reading is not None:
            resolved = resolved.with_mu_per_reading(given.mu_per_reading)
        today = self.store.stamp()[:10]
        filled = fill_from_registers(
            self.store,
            metadata,
            on=datetime.date.fromisoformat(today),
            validity_years=self.default_thresholds.certificate_validity_years,
        )
        checked = rules.validate_metadata(filled)
        if given.replay_of is None:
            checked = rules.validate_metadata(
                carried_metadata(self.store, checked, resolved, today)
            )
        session_id = self.store.create_session(
            metadata=checked,
            plan=resolved.to_dict(),
            convention=str(checked["convention"]),
            beam=str(checked["beam"]),
            replay_of=given.replay_of,
            actor=actor,
        )
        self.session_id, self.plan, self.metadata = session_id, resolved, checked
        self.skipped, self.active, self.bias_V = set(), None, None
        self.integration_s, self.actual_MU = {}, {}
        self.thresholds = self.default_thresholds
        self._event(actor, EventKind.THRESHOLDS, asdict(self.thresholds))
        acquisition = ev.Acquisition(profile=self.profile, time_scale=self.time_scale)
        self._event(actor, EventKind.ACQUISITION, acquisition)
        carried = {k: checked[f"carried_{k}"] for k in MEASURED_BY if checked[f"carried_{k}"]}
        if carried:
            self._event(actor, EventKind.CARRIED_FACTORS, carried)
        if given.mu_per_reading is not None:
            chosen_mu = ev.MuPerReadingSet(
                plan_MU=planned_mu, mu_per_reading=resolved.result_mu_per_reading()
            )
            self._event(actor, EventKind.MU_PER_READING_SET, chosen_mu)
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

    def _on_environment(self, given: inputs.EnterEnvironment) -> int:
        """Record an environment entry (°C, pressure in its unit, % RH) after range checks."""
        self._require(Method.ENVIRONMENT_SET)
        entry = rules.check_environment(
            given.temperature_C, given.pressure, given.pressure_unit, given.humidity_pct
        )
        source, actor = given.source, given.actor
        assert self.session_id is not None
        entry_id = self.store.add_environment(self.session_id, source=source, **entry)
        entered = ev.EnvironmentEntered(environment_id=entry_id, source=source, **entry)
        self._event(actor, EventKind.ENVIRONMENT_ENTERED, entered)
        self._changed()
        return entry_id

    def _on_short_delivery(self, given: inputs.ShortDelivery) -> None:
        """Record that the delivery of a reading of this session stopped short at
        ``given.actual_MU`` (the MU the treatment machine reports), with the operator's reason;
        the results then refer the reading to the planned MU. Refused by name for a reading of
        another session or without beam, an MU not below the planned, an empty reason, or a
        second record."""
        reading_id, reason = given.reading, given.reason
        self._require(Method.READING_SHORT)
        assert self.session_id is not None
        found = [r for r in self.store.readings(self.session_id) if r.id == reading_id]
        if not found:
            raise InputError(
                "reading", reading_id, f"a reading of session {self.session_id}", "is not one"
            )
        reading = found[0]
        assert self.plan is not None
        step = self.plan.steps[self.store.reading_set(reading.set_id).step_index]
        if not step.uses_beam:
            raise InputError("reading", reading_id, "a reading with beam", "was read without beam")
        if reading_id in self.actual_MU:
            raise InputError(
                "reading",
                reading_id,
                "a reading whose delivered MU is not yet recorded",
                f"is already recorded at {self.actual_MU[reading_id]:g} MU",
            )
        planned = float(step.mu_per_reading)
        actual = check_actual_MU(given.actual_MU, planned)
        if not isinstance(reason, str) or not reason.strip():
            raise InputError("reason", reason, "why the delivery stopped short", "is empty")
        short = ev.DeliveryShort(
            reading_id=reading_id,
            set_id=reading.set_id,
            planned_MU=planned,
            actual_MU=actual,
            reason=reason.strip(),
        )
        self._event(given.actor, EventKind.DELIVERY_SHORT, short)
        self.actual_MU[reading_id] = actual
        self._changed()

    def _on_manual_done(self, given: inputs.ManualDone) -> None:
        """Record that the pending manual step was done by hand (who: ``actor``)."""
        note, actor = given.note, given.actor
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

    def _on_skip(self, given: inputs.Skip) -> None:
        """Skip the current (optional) step."""
        actor = given.actor
        self._require(Method.STEP_SKIP)
        assert self.step_index is not None and self.step is not None
        skipped = ev.StepSkipped(step_index=self.step_index, step_key=self.step.key)
        self._event(actor, EventKind.STEP_SKIPPED, skipped)
        self.skipped.add(self.step_index)
        self._advance(actor, Method.STEP_SKIP)
        self._changed()

    def _on_arm(self, given: inputs.Arm) -> None:
        """Start the current step's set (or continue an interrupted one)."""
        actor = given.actor
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
            self.settle_until_s = self._now() + wait_s
            self._goto(S.SETTLING, Method.STEP_ARM, actor, set_id=set_id, wait_s=wait_s)
        else:
            self._begin_reading(actor, Method.STEP_ARM)
        self._changed()

    def _on_capture(self, given: inputs.Capture) -> None:
        """Capture the charge integrated so far (as of the latest sample) as a manual reading."""
        actor = given.actor
        self._require(Method.READING_CAPTURE)
        assert self.reading is not None and self.reading.last_t_s is not None
        captured = self.reading.capture_now(self.reading.last_t_s)
        if captured is not None:
            self._record(captured, actor)
        self._changed()

    def _on_accept(self, given: inputs.Accept) -> None:
        """Accept the reviewed set and go on to the next step (or finish)."""
        actor = given.actor
        self._require(Method.SET_ACCEPT)
        assert self.active is not None
        self.store.set_set_status(self.active.id, "accepted", actor=actor)
        self.active = None
        self.notice = None
        self._advance(actor, Method.SET_ACCEPT)
        self._changed()

    def _on_redo(self, given: inputs.Redo) -> None:
        """Mark the current set superseded with ``reason`` and rewind to the same step."""
        self._require(Method.SET_REDO)
        reason, actor = rules.require_reason("reason", given.reason), given.actor
        self._drop_reading(actor, "redo")
        self.notice = None  # the operator chose to start the set again: nothing to repeat
        if self.active is not None:
            self.store.set_set_status(self.active.id, "superseded", reason, actor=actor)
        self.active = None
        self.settle_until_s = None
        self._goto(S.WAITING_FOR_OPERATOR, Method.SET_REDO, actor, reason=reason)
        self._changed()

    def _on_pause(self, given: inputs.Pause) -> None:
        """Hold the sequence; a reading in progress is dropped and logged."""
        actor = given.actor
        self._require(Method.SESSION_PAUSE)
        self._drop_reading(actor, "pause")
        self.paused_from = self.state
        self._goto(S.PAUSED, Method.SESSION_PAUSE, actor)
        self._changed()

    def _on_resume(self, given: inputs.Resume) -> None:
        """Return to the state the session was paused from; re-arm a set that was collecting."""
        actor = given.actor
        self._require(Method.SESSION_RESUME)
        target = self.paused_from or S.WAITING_FOR_OPERATOR
        self.paused_from = None
        if target in (S.SETTLING, S.COLLECTING) and not self.instrument_connected:
            target = S.INTERRUPTED
        if target in (S.SETTLING, S.COLLECTING):
            if self.settle_until_s is not None:
                wait_s = rules.settling_wait_s(self.step) * self.time_scale
                self.settle_until_s = self._now() + wait_s
                self._goto(S.SETTLING, Method.SESSION_RESUME, actor)
            else:
                self._begin_reading(actor, Method.SESSION_RESUME)
        else:
            self._goto(target, Method.SESSION_RESUME, actor)
        self._changed()

    def _on_stop(self, given: inputs.Stop) -> None:
        """End the session early as finished; a set not yet accepted is closed as aborted."""
        self._require(Method.SESSION_STOP)
        reason, actor = rules.require_reason("reason", given.reason), given.actor
        self._close_session("finished", S.FINISHED, Method.SESSION_STOP, reason, actor)

    def _on_abort(self, given: inputs.Abort) -> None:
        """Abandon the session (needs confirm=True); everything recorded is kept."""
        self._require(Method.SESSION_ABORT)
        reason, actor = rules.require_reason("reason", given.reason), given.actor
        if given.confirm is not True:
            raise ConfirmationRequired(
                "abort needs confirm = true: the session will end as aborted (nothing is deleted)"
            )
        self._close_session("aborted", S.ABORTED, Method.SESSION_ABORT, reason, actor)

    def _on_close(self, given: inputs.Close) -> None:
        """Leave a finished or aborted session; the engine is idle again."""
        actor = given.actor
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
    def _take_sample(self, sample: inputs.Sample) -> None:
        """Take one sample from the instrument (charge in nC, receive time in s on the driver's
        clock; its raw line, row ``line_id``, is in the store before the sample reaches the
        engine). A reading names the raw line of the sample it was taken at.

        A sample that only moves the charge writes nothing: it is kept, in order, and logged
        with the next input that writes (the capture it leads to, or any other), in a run with
        the samples of the lines next to its own (see :mod:`sample_log`). Such a sample changes
        only what is in memory, which a crash loses with it.
        """
        reading = self.reading
        if reading is None:
            return
        before = vars(reading).copy(), self.reading_status, self.sample_line_id
        self.reading_status = sample.status
        if sample.t_s >= reading.armed_t_s:  # a stale sample is ignored (see ReadingCapture.feed)
            self.sample_line_id = sample.line_id
        assert sample.clock_s is not None  # apply gave it the engine's clock
        self._unlogged_samples.append((sample.clock_s, (sample,), (sample.line_id,), sample.actor))
        captured = reading.feed(sample.t_s, sample.charge_nC, sample.complete)
        if captured is None:
            return  # nothing recorded: no transaction for a sample that only moves the charge
        self._unlogged_samples.pop()  # logged as the input of the capture's transaction
        try:
            self._in_transaction(sample, lambda: self._record_captured(captured))
        except BaseException:  # the sample is not taken: the next one may capture again
            vars(reading).update(before[0])
            self.reading_status, self.sample_line_id = before[1], before[2]
            raise

    def take_samples(
        self,
        samples: Sequence[Any],
        line_ids: Sequence[int | None],
        clock_s: float,
        actor: str = DAEMON_ACTOR,
    ) -> int:
        """Take pushed samples in order until one completes the reading: the same state, the
        same record and the same input log as applying an :class:`inputs.Sample` for each, one
        at a time, at ``clock_s``, but in one call (a streaming instrument brings thousands a
        second, nearly all of which only move the charge). Each sample has ``t_s`` (s),
        ``charge_nC``, ``complete`` and ``status`` (text); ``line_ids`` the row of each one's
        raw line; ``actor`` who gives them (the daemon, or a replay of it). Return how many were
        taken (:attr:`samples_taken` says it too, as they are taken: a capture that fails to be
        recorded raises, and its sample is not taken).
        """
        self.samples_taken = 0
        reading = self.reading
        if reading is None or not samples:
            return 0
        fed, captured, before = reading.feed_run(samples)
        kept = fed - 1 if captured is not None else fed  # the one that completed it is logged
        # with its capture, after the ones that only moved the charge
        status, line_id = self.reading_status, self.sample_line_id
        if kept:
            self._unlogged_samples.append((clock_s, samples[:kept], line_ids[:kept], actor))
            status = str(samples[kept - 1].status)
            line_id = _latest_line(samples, line_ids, kept, reading.armed_t_s, line_id)
        self.samples_taken = kept
        if captured is None:
            self.reading_status, self.sample_line_id = status, line_id
            return kept
        # the sample that completes the reading is applied as one input, from the state
        # before it: its capture is recorded (or refused) exactly as apply records one
        vars(reading).update(before)
        self.reading_status, self.sample_line_id = status, line_id
        self.apply(sample_log.sample_input(clock_s, samples[kept], line_ids[kept], actor))
        self.samples_taken = fed
        return fed

    def _record_captured(self, captured: Captured) -> None:
        """Record a captured reading and all that follows from it (or drop a lost one)."""
        if captured.capture is CaptureKind.LOST:
            self._lose_reading(captured)
        else:
            self._record(captured, DAEMON_ACTOR)
        self._changed()

    def _lose_reading(self, captured: Captured) -> None:
        """Drop the reading in progress: the auto-reset instrument zeroed itself after it, but
        its completed reading never arrived. Nothing is sent: the next reading integrates on
        from the sample that showed the reset (s, ``captured.t_s``)."""
        why = LOST_READING
        dropped = ev.ReadingDropped(why=why, charge_nC=captured.charge_nC)
        self._event(DAEMON_ACTOR, EventKind.READING_DROPPED, dropped)
        self.reading = None
        self._begin_reading(DAEMON_ACTOR, why, captured.t_s)
        self.notice = dropped_reading_notice(ReadingPhase.HOLDING, captured.charge_nC, why)

    def _wait_over(self, now_s: float) -> bool:
        """Return True when a settling wait is over at ``now_s`` (s on the engine's clock)."""
        waiting = self.state is S.SETTLING and self.reading is None
        return waiting and self.settle_until_s is not None and now_s >= self.settle_until_s

    def _on_tick(self, given: inputs.Tick) -> None:
        """Begin the reading a settling wait held back.

        Readings are not captured on ticks: the hold time and a timed integration end with the
        first sample received after them (see the module docstring).
        """
        self.settle_until_s = None
        self._begin_reading(DAEMON_ACTOR, "settling wait over")
        self._changed()

    def _on_instrument_lost(self, given: inputs.InstrumentLost) -> object:
        """The electrometer went away (or failed a command, ``still_connected``): a set in
        progress becomes interrupted with its readings kept."""
        if not self.instrument_connected:
            return UNCHANGED
        message, still_connected = given.message, given.still_connected
        self.instrument_connected = still_connected
        self.instrument_message = message
        kind = EventKind.INSTRUMENT_FAULT if still_connected else EventKind.INSTRUMENT_LOST
        self._event(DAEMON_ACTOR, kind, ev.InstrumentMessage(message=message))
        self._interrupt_set("instrument lost", message)
        self._changed()
        return None

    def _on_bench_refused(self, given: inputs.BenchRefused) -> None:
        """The bench refused what the daemon asked of it (a beam, while the one before is still
        on after an early capture; a turn of the bias switch): the reading it was for cannot be
        taken, so a set in progress is interrupted with its readings kept. Said as the bench's
        refusal: the electrometer's state and message are not touched."""
        message, active = given.message, self.active
        number = None if self.reading is None or active is None else len(active.readings) + 1
        refused = ev.BenchRefused(
            message=message, set_id=None if active is None else active.id, reading_number=number
        )
        self._event(DAEMON_ACTOR, EventKind.BENCH_REFUSED, refused)
        if self._interrupt_set("bench refused", message):
            of = "" if number is None else f" of reading {number}"
            self.notice = (
                f"The beam{of} could not be started: {message}. The set is interrupted and "
                "its readings are kept: continue it (arm) once the bench is ready, or redo it."
            )
        else:
            self.notice = f"The bench refused: {message}."
        self._changed()

    def _interrupt_set(self, why: str, message: str) -> bool:
        """Interrupt the set in progress (settling or collecting, or paused there) because of
        ``why`` (the state change's action) and ``message`` (its reason): the reading in
        progress is dropped, the readings taken are kept. Return False when none was."""
        busy = (S.SETTLING, S.COLLECTING)
        if not (self.state in busy or (self.state is S.PAUSED and self.paused_from in busy)):
            return False
        self._drop_reading(DAEMON_ACTOR, why)
        assert self.active is not None
        self.store.set_set_status(self.active.id, "interrupted", message)
        self.settle_until_s = None
        if self.state is S.PAUSED:
            self.paused_from = S.INTERRUPTED
        else:
            self._goto(S.INTERRUPTED, why, DAEMON_ACTOR, reason=message)
        return True

    def instrument_unreachable(self, message: str) -> None:
        """The electrometer cannot be reached yet (or again): show why, while it stays away."""
        if self.instrument_connected or message == self.instrument_message:
            return
        self.instrument_message = message
        self._changed()

    def _on_instrument_back(self, given: inputs.InstrumentBack) -> object:
        """The electrometer answers again (or for the first time); record who it says it is
        (``identity``, an ``instrument_identified`` event) with its return."""
        identity = given.identity
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
            return None if identity else UNCHANGED
        self.instrument_connected, self.instrument_message = True, None
        self._event(DAEMON_ACTOR, EventKind.INSTRUMENT_BACK, ev.InstrumentBack(identity=identity))
        self._changed()
        return None

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

    def _begin_reading(self, actor: str, action: str, run_on_at_s: float | None = None) -> None:
        """Arm the next reading: zero and start the instrument, and the beam if the bench gives
        it. ``run_on_at_s``: the instrument resets itself (auto-reset) and integrates on from
        this time (s, the driver's clock: the sample that completed the reading before), so
        nothing is sent to it, and the samples after that one belong to this reading."""
        step = self.step
        assert step is not None and self.active is not None and self.plan is not None
        settling = self._settling_needed()
        new_state = S.SETTLING if settling else S.COLLECTING
        if self.instrument_connected:
            self.instrument_message = None  # a fault the operator has seen and acted on
        if self.state is not new_state:
            self._goto(new_state, action, actor, set_id=self.active.id)
        runs_on = run_on_at_s is not None
        zeroed = self._can(Capability.ZERO) or runs_on
        timed_s = rules.timed_s(step)
        self.reading = ReadingCapture(
            capture_settings(self.plan, self.time_scale),
            self._now() if run_on_at_s is None else run_on_at_s,
            None if timed_s is None else timed_s * self.time_scale,
            baseline_nC=0.0 if zeroed else None,
            resets_itself=self._can(Capability.AUTO_RESET),
        )
        self.reading_status = "ok"
        if not runs_on:  # else the instrument zeroed itself and integrates on: the same arming
            self._run += 1
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
        # an auto-reset instrument goes on to the next reading by itself: stopped at the set's end
        runs_on = self._can(Capability.AUTO_RESET) and captured.capture is CaptureKind.PUSHED
        if self._can(Capability.INTEGRATE) and not runs_on:
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
            self._begin_reading(actor, "reading recorded", captured.t_s if runs_on else None)
            return
        if self._can(Capability.INTEGRATE) and runs_on:
            self._issue(driver_commands.StopIntegration())
        self.store.set_set_status(active.id, "reviewing", actor=actor)
        self._goto(S.REVIEWING, "set complete", actor, set_id=active.id)

    # ------------------------------------------------------------------------ restart
    def _on_restart(self, given: inputs.Restart) -> object:
        """Resume the store's open session, if any; return True when one was resumed."""
        row = self.store.open_session()
        if row is None:
            return UNCHANGED
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
        self.actual_MU = rules.actual_monitor_units(events)
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
                self.plan,
                self.metadata,
                self.thresholds,
                self.integration_s,
                self.time_scale,
                self.actual_MU,
            )
            active_id = self.active.id if self.active is not None else None
            found = evaluate_session(self.store, self.session_id, context, active_id)
            value = (found.results(), found.provisional, found.error)
        self._results_cache = (self.data_version, value)
        return value

    @property
    def results_stale(self) -> bool:
        """Return True when what is recorded changed since the results were last computed."""
        cache = self._results_cache
        return cache is None or cache[0] != self.data_version

    @property
    def last_results(self) -> Results | None:
        """The results computed last (perhaps before the latest change; see
        :attr:`results_stale`), or None when none were computed yet."""
        return None if self._results_cache is None else self._results_cache[1]

    def snapshot(self, results: Results | None = None) -> Snapshot:
        """Return the whole state as the protocol's Snapshot; with ``results`` (the results
        computed last, while readings stream) those are shown instead of computing them anew."""
        from chargebook.acquire.engine.snapshot import build_snapshot

        return build_snapshot(self, results)

    @property
    def live_phase(self) -> ReadingPhase:
        return self.reading.phase if self.reading is not None else ReadingPhase.IDLE


#: Each kind of input and the Engine method that applies it: the engine's one dispatch.
HANDLERS: dict[type[inputs.Input], Callable[[Engine, Any], Any]] = {
    inputs.StartSession: Engine._on_start_session,
    inputs.EnterEnvironment: Engine._on_environment,
    inputs.ShortDelivery: Engine._on_short_delivery,
    inputs.Arm: Engine._on_arm,
    inputs.ManualDone: Engine._on_manual_done,
    inputs.Skip: Engine._on_skip,
    inputs.Capture: Engine._on_capture,
    inputs.Accept: Engine._on_accept,
    inputs.Redo: Engine._on_redo,
    inputs.Pause: Engine._on_pause,
    inputs.Resume: Engine._on_resume,
    inputs.Stop: Engine._on_stop,
    inputs.Abort: Engine._on_abort,
    inputs.Close: Engine._on_close,
    inputs.Tick: Engine._on_tick,
    inputs.InstrumentLost: Engine._on_instrument_lost,
    inputs.InstrumentBack: Engine._on_instrument_back,
    inputs.Restart: Engine._on_restart,
    inputs.BenchRefused: Engine._on_bench_refused,
}


def dropped_reading_notice(phase: ReadingPhase, charge_nC: float | None, why: str) -> str:
    """Return what the operator must be told when a reading in progress is discarded."""
    cause = {
        LOST_READING: (
            "the electrometer reset itself after it (auto-reset) but its completed reading "
            "never arrived (a line lost or refused on the way)"
        ),
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


def _latest_line(
    samples: Sequence[Any],
    line_ids: Sequence[int | None],
    count: int,
    armed_t_s: float,
    otherwise: int | None,
) -> int | None:
    """Return the line of the latest of the first ``count`` samples that is not stale (from
    before ``armed_t_s``); ``otherwise`` when all are."""
    for index in range(count - 1, -1, -1):
        if samples[index].t_s >= armed_t_s:
            return line_ids[index]
    return otherwise
