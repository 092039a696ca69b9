"""The engine's whole state as the protocol's ``Snapshot`` (see ``acquire/protocol.py``)."""

from __future__ import annotations

import weakref
from collections.abc import Mapping
from dataclasses import dataclass, field
from itertools import compress, repeat
from operator import attrgetter, eq, is_not, itemgetter, or_
from typing import TYPE_CHECKING, Any

from chargebook.acquire.protocol import (
    CAUTION,
    EngineState,
    EnvironmentInfo,
    FlagInfo,
    LiveReading,
    PromptInfo,
    ReadingInfo,
    ReadingPhase,
    SessionInfo,
    SetInfo,
    Snapshot,
    StepInfo,
)
from chargebook.acquire.record.store import EnvironmentRow, ReadingRow, SetRow
from chargebook.acquire.session import rules
from chargebook.acquire.session.numbering import next_reading_label, reading_labels
from chargebook.acquire.session.plan import Step

if TYPE_CHECKING:
    from chargebook.acquire.engine.engine import Engine, Results

S = EngineState

_ID = attrgetter("id")
_STATUS = itemgetter("status")
_STEP_INDEX = itemgetter("step_index")


@dataclass
class _Kept:
    """What an engine's last snapshot was built from, and the parts built, to be used again
    where nothing they depend on changed (the very objects: a client compares by identity,
    and :func:`protocol.snapshot_delta` finds what changed without comparing the rest)."""

    #: The sets' rows, their readings, whether each one's flags use the routine set's
    #: charge per MU, the plan, thresholds and that reference they were computed with.
    rows: list[SetRow] = field(default_factory=list)
    owns: list[tuple[ReadingRow, ...]] = field(default_factory=list)
    compared: list[bool] = field(default_factory=list)
    plan: object = None
    thresholds: object = None
    reference: float | None = None
    entries: list[SetInfo] = field(default_factory=list)
    #: The sets whose entry shows statistics and flags from before its latest readings.
    grown: set[int] = field(default_factory=set)
    #: The session's row and its entry; the environment rows and their entries.
    session: tuple[object, str, SessionInfo | None] = (None, "", None)
    environment: tuple[list[object], list[EnvironmentInfo]] = ([], [])


#: Per engine: what its last snapshot was built from (see :class:`_Kept`). A set's statistics
#: and flags are recomputed only when its row, its readings, the thresholds or the plan
#: changed, so a finished set costs nothing while another one is being taken, and finding
#: the set that changed among hundreds is a few passes in C, not a Python loop over them.
_KEPT: weakref.WeakKeyDictionary[Engine, _Kept] = weakref.WeakKeyDictionary()


def build_snapshot(engine: Engine, results_shown: Results | None = None) -> Snapshot:
    """Return the protocol Snapshot of ``engine`` (session, plan, sets, live, results ...);
    ``results_shown``: the results to show, when not the engine's results now (computed last,
    while readings stream). With them, a set that only gained readings since the last snapshot
    shows its new readings at once and its statistics and flags as computed last: those are
    computed again with the results, which follow (see :func:`_grown_entry`)."""
    store, session_id = engine.store, engine.session_id
    sets: list[SetInfo] = []
    environment: EnvironmentInfo | None = None
    entries: list[EnvironmentInfo] = []
    session: SessionInfo | None = None
    shown = engine.results() if results_shown is None else results_shown
    results, provisional, results_error = shown
    if session_id is not None:
        assert engine.plan is not None  # a session is open: its plan is known
        kept = _KEPT.setdefault(engine, _Kept())
        session = _session_info(kept, store.session(session_id), engine.plan.name)
        rows, by_set = store.sets(session_id), store.readings_by_set(session_id)
        sets = _sets_info(engine, rows, by_set, summaries_later=results_shown is not None)
        entries = _environment_entries(kept, store.environment(session_id))
        if entries:
            environment = entries[-1]
    active_id = engine.active.id if engine.active is not None else None
    current = next((s for s in reversed(sets) if s["id"] == active_id), None)
    return {
        "seq": engine.seq,
        "state": engine.state.value,
        "paused_from": engine.paused_from.value if engine.paused_from else None,
        "allowed": engine.allowed(),
        "prompt": prompt(engine),
        "notice": engine.notice,
        "session": session,
        "plan": _plan_info(engine, sets),
        "step_index": engine.step_index,
        "current_set": current,
        "sets": sets,
        "live": _live(engine),
        "environment": environment,
        "environment_entries": entries,
        "results": results,
        "results_provisional": provisional,
        "results_error": results_error,
        "instrument": {
            "connected": engine.instrument_connected,
            "profile": engine.profile,
            "identity": engine.identity,
            "capabilities": sorted(c.value for c in engine.capabilities),
            "message": "; ".join(
                note for note in (engine.instrument_message, engine.reply_note) if note
            )
            or None,
            "bench": engine.bench,
        },
        "record": {"writable": engine.record_fault is None, "message": engine.record_fault},
        "caution": CAUTION,
    }


def _session_info(kept: _Kept, row: Any, plan_name: str) -> SessionInfo:
    """Return the session's entry: the one built last while its row and plan are the same."""
    if kept.session[2] is not None and kept.session[1] == plan_name and kept.session[0] == row:
        return kept.session[2]
    session: SessionInfo = {
        "id": row.id,
        "status": row.status,
        "created_at": row.created_at,
        "metadata": row.metadata(),
        "convention": row.convention,
        "beam": row.beam,
        "plan_name": plan_name,
        "reason": row.reason,
    }
    kept.session = (row, plan_name, session)
    return session


def _environment_entries(kept: _Kept, rows: list[EnvironmentRow]) -> list[EnvironmentInfo]:
    """Return the session's environment entries: the list built last while its rows are."""
    if rows == kept.environment[0]:
        return kept.environment[1]
    entries = [_environment_info(entry) for entry in rows]
    kept.environment = (list(rows), entries)
    return entries


def _sets_info(
    engine: Engine,
    rows: list[SetRow],
    by_set: Mapping[int, tuple[ReadingRow, ...]],
    *,
    summaries_later: bool = False,
) -> list[SetInfo]:
    """Return every set's entry, reusing the entries of sets whose inputs did not change (the
    very dict: a set that did not change is the same object in the next snapshot).
    ``summaries_later``: a set that only gained readings keeps its statistics and flags as
    computed last (:func:`_grown_entry`); the next snapshot without it computes them."""
    plan = engine.plan
    assert plan is not None  # sets exist only in a session
    kept = _KEPT.setdefault(engine, _Kept())
    reference = rules.routine_nC_per_MU(plan, rows, by_set)
    owns: list[tuple[ReadingRow, ...]] = list(map(by_set.get, map(_ID, rows), repeat(())))
    if kept.plan is plan and kept.thresholds == engine.thresholds:
        same = min(len(rows), len(kept.rows))
        kept_rows, kept_owns = kept.rows, kept.owns
        # the sets whose row or readings are other objects (in C), then those really changed
        moved = compress(
            range(same), map(or_, map(is_not, rows, kept_rows), map(is_not, owns, kept_owns))
        )
        changed = {i for i in moved if rows[i] != kept_rows[i] or owns[i] != kept_owns[i]}
        if reference != kept.reference:  # only the delivery flags of compared sets use it
            changed.update(compress(range(same), kept.compared))
        # the sets shown with earlier statistics: theirs are due, unless they wait again
        changed.update(index for index in kept.grown if index < same)
        entries, compared = kept.entries[:same], kept.compared[:same]
    else:
        same, changed, entries, compared = 0, set(), [], []
    steps = plan.steps
    kept.grown = set()
    for index in sorted(changed) + list(range(same, len(rows))):
        row = rows[index]
        step = steps[row.step_index] if row.step_index < len(steps) else None
        entry = None
        if summaries_later and index < same and rows[index] == kept.rows[index]:
            entry = _grown_entry(entries[index], kept.owns[index], owns[index])
        if entry is not None:
            kept.grown.add(index)
        else:
            entry = _set_info(engine, row, list(owns[index]), step, reference)
        # only the delivery flags of a beam set other than the routine one use the reference
        uses = step is not None and step.uses_beam and step.purpose != "routine"
        if index < same:
            entries[index], compared[index] = entry, uses
        else:
            entries.append(entry)
            compared.append(uses)
    kept.rows, kept.owns, kept.compared, kept.entries = list(rows), owns, compared, entries
    kept.plan, kept.thresholds, kept.reference = plan, engine.thresholds, reference
    return list(entries)


def _grown_entry(
    entry: SetInfo, before: tuple[ReadingRow, ...], own: tuple[ReadingRow, ...]
) -> SetInfo | None:
    """Return a set's ``entry`` with the readings it gained since it showed ``before`` (each
    with the flags of its own status; the flags that compare it with the others follow with the
    statistics), its statistics and flags unchanged; None unless ``own`` only extends
    ``before``. While readings stream in at tens a second, the statistics and flags are then
    computed with the results, at most every few tenths of a second, not at every reading."""
    held = len(before)
    if len(own) <= held or own[:held] != before:
        return None
    labels = reading_labels(reading.settling for reading in own)[held:]
    added = [
        _reading_info(reading, label, rules.reading_flags(reading, False))
        for reading, label in zip(own[held:], labels, strict=True)
    ]
    done = entry["readings_done"] + sum(1 for reading in own[held:] if not reading.settling)
    return {**entry, "readings": [*entry["readings"], *added], "readings_done": done}


def _reading_info(reading: ReadingRow, label: str, flags: list[FlagInfo]) -> ReadingInfo:
    """Return one reading's entry in its set's (``label``: its number as shown)."""
    return {
        "id": reading.id,
        "seq": reading.seq,
        "label": label,
        "t_s": reading.t_s,
        "charge_nC": reading.charge_nC,
        "capture": reading.capture,
        "settling": bool(reading.settling),
        "status": reading.status,
        "recorded_at": reading.recorded_at,
        "flags": flags,
    }


def _set_info(
    engine: Engine, row: SetRow, own: list[ReadingRow], step: Step | None, reference: float | None
) -> SetInfo:
    """Return the protocol entry of one set: its readings, statistics and flags (``reference``:
    the routine set's charge per MU, nC/MU)."""
    stats, flags, per_reading = rules.set_summary(row.purpose, row.bias_V, own, engine.thresholds)
    flags += rules.delivery_flags(step, own, engine.integration_s, engine.time_scale, reference)
    return {
        "id": row.id,
        "step_index": row.step_index,
        "step_key": row.step_key,
        "purpose": row.purpose,
        "polarity": row.polarity,
        "bias_V": row.bias_V,
        "attempt": row.attempt,
        "status": row.status,
        "reason": row.reason,
        "readings": [
            _reading_info(r, label, per_reading.get(r.id, []))
            for r, label in zip(own, reading_labels(r.settling for r in own), strict=True)
        ],
        "readings_needed": int(step.readings) if step is not None else len(own),
        "readings_done": sum(1 for r in own if not r.settling),
        "stats": stats,
        "flags": flags,
    }


def _environment_info(entry: EnvironmentRow) -> EnvironmentInfo:
    return {
        "temperature_C": entry.temperature_C,
        "pressure_kPa": entry.pressure_kPa,
        "pressure_entered": entry.pressure_entered,
        "pressure_unit": entry.pressure_unit,
        "humidity_pct": entry.humidity_pct,
        "source": entry.source,
        "recorded_at": entry.recorded_at,
    }


def _plan_info(engine: Engine, sets: list[SetInfo]) -> list[StepInfo]:
    if engine.plan is None:
        return []
    accepted = set(
        map(_STEP_INDEX, compress(sets, map(eq, map(_STATUS, sets), repeat("accepted"))))
    )
    steps: list[StepInfo] = []
    for index, step in enumerate(engine.plan.steps):
        if index in accepted:
            status = "accepted"
        elif index in engine.skipped:
            status = "skipped"
        elif index == engine.step_index and engine.state not in (S.FINISHED, S.ABORTED):
            status = "current"
        else:
            status = "pending"
        steps.append(
            {
                "index": index,
                "key": step.key,
                "purpose": step.purpose,
                "polarity": step.polarity,
                "bias_V": step.bias_V,
                "readings": step.readings,
                "mu_per_reading": step.mu_per_reading,
                "optional": step.optional,
                "prompt": step.prompt,
                "status": status,
            }
        )
    return steps


def _live(engine: Engine) -> LiveReading:
    reading = engine.reading
    if reading is None:
        return {
            "phase": ReadingPhase.IDLE.value,
            "charge_nC": None,
            "elapsed_s": None,
            "seq": None,
            "label": None,
        }
    elapsed = None if reading.last_t_s is None else reading.last_t_s - reading.armed_t_s
    active = engine.active
    seq = label = None
    if active is not None:
        seq = len(active.readings) + 1
        taken = [bool(r.settling) for r in active.readings]
        label = next_reading_label(taken, engine.state is S.SETTLING)
    return {
        "phase": reading.phase.value,
        "charge_nC": reading.last_charge_nC,
        "elapsed_s": elapsed,
        "seq": seq,
        "label": label,
    }


def _bias_text(volts: float) -> str:
    return f"{volts:+g} V".replace("-", "−")


def prompt(engine: Engine) -> PromptInfo:
    """Return what the operator must do now, in plain words (PromptInfo)."""
    state, step = engine.state, engine.step
    if engine.record_fault is not None:
        return {
            "kind": "record_fault",
            "text": f"Do not deliver beam: {engine.record_fault}. No reading can be taken "
            "until it is writable again; what was received is held and will be recorded.",
        }
    if state is S.IDLE:
        return {"kind": "start", "text": "Start a session: enter the session details."}
    if state is S.FINISHED:
        return {"kind": "done", "text": "The session is finished. Review the results."}
    if state is S.ABORTED:
        return {"kind": "done", "text": "The session was aborted; everything recorded is kept."}
    if state is S.PAUSED:
        return {"kind": "paused", "text": "Paused. Resume to carry on where you left off."}
    if state is S.INTERRUPTED:
        where = "" if engine.instrument_connected else " It is not connected: waiting for it."
        return {
            "kind": "interrupted",
            "text": "The set was interrupted before it was complete; its readings are kept."
            + where
            + " Continue the set (arm) or redo it.",
        }
    if state is S.REVIEWING:
        return {
            "kind": "review",
            "text": "The set is complete. Check the readings and flags, then accept it or redo it.",
        }
    assert step is not None
    if state is S.WAITING_FOR_OPERATOR:
        return _waiting_prompt(engine, step)
    if state is S.SETTLING and engine.reading is None:
        return {
            "kind": "deliver_beam",
            "text": f"Letting the chamber settle at {_bias_text(step.bias_V)} before the readings.",
        }
    return _beam_prompt(engine, step)


def _waiting_prompt(engine: Engine, step: Step) -> PromptInfo:
    if engine.session_id is not None and not engine.store.environment(engine.session_id):
        return {
            "kind": "environment",
            "text": "Enter the air temperature and pressure at the chamber.",
        }
    if engine.pending_manual is not None:
        volts = engine.pending_manual["volts"]
        return {
            "kind": "manual",
            "text": f"Turn the bias to {_bias_text(volts)} by hand, then confirm it is done.",
            "manual_action": {**engine.pending_manual},
        }
    if not engine.instrument_connected:
        return {"kind": "interrupted", "text": "The electrometer is not connected: waiting for it."}
    return {"kind": "arm", "text": f"{step.prompt} Arm when ready."}


def _beam_prompt(engine: Engine, step: Step) -> PromptInfo:
    active = engine.active
    done = active.used_count if active is not None else 0
    if not step.uses_beam:
        return {
            "kind": "deliver_beam",
            "text": f"Measuring leakage with the beam off: {step.duration_s:g} s.",
        }
    taken = [bool(r.settling) for r in active.readings] if active is not None else []
    which = (
        f"settling reading {next_reading_label(taken, True)}, kept but not used"
        if engine.state is S.SETTLING
        else f"reading {done + 1} of {step.readings}"
    )
    who = "The bench is delivering" if engine.bench else "Deliver"
    return {"kind": "deliver_beam", "text": f"{who} {step.mu_per_reading:g} MU now ({which})."}
