"""One evaluation of a session: its recorded inputs gathered once, ``evaluate`` called once.

:func:`evaluate_session` is the only place that turns a stored session into results. The live
results of the engine, ``run --json`` and the demo's result document, ``show``, ``export``
(json, csv, html), ``history`` and replay's comparison all call it, so the console, the CLI and
the archived record say the same thing, flag for flag and number for number.

What it gathers, from the store:

* the session's plan and metadata (as stored), and the stability thresholds the session was
  started with (its ``thresholds`` event; ``serve --thresholds FILE``);
* the readings of each result set: a step's accepted set, else (live only) the set being taken;
* the leakage charge, scaled from the leakage integration time to a routine reading's
  (arming-to-capture times from the ``reading_recorded`` events);
* the environment: every entry (to flag a change), and for each result set the entry in force
  when that set was taken: the entry recorded last at or before the set's first reading (the
  first entry of the session when none was recorded before it). ``corrections`` refers each
  set's mean to reference air with it before forming k_pol and k_s.
* the carried k_pol and k_s of an output check, as copied into the session's metadata when it
  started (``carried_k_pol``, ``carried_k_s``; :mod:`chargebook.acquire.session.carried`), so a
  later session never changes an old record's results.

Nothing here computes physics.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

from chargebook.acquire.record.reader import RecordReader
from chargebook.acquire.record.store import EnvironmentRow, EventRow, ReadingRow, SetRow
from chargebook.acquire.session import rules
from chargebook.acquire.session.metadata import SessionMetadata, validate_metadata
from chargebook.acquire.session.plan import Plan
from chargebook.corrections.carried import MEASURED_BY
from chargebook.corrections.delivered_mu import charge_at_planned_MU_nC
from chargebook.corrections.errors import Flag, InputError
from chargebook.corrections.evaluate import Evaluation, MeasurementInputs, evaluate
from chargebook.corrections.leakage import leakage_per_reading_nC
from chargebook.corrections.set_air import SetEnvironment
from chargebook.corrections.stability import Thresholds
from chargebook.corrections.units import Conversion

#: The plan purposes whose readings feed the results, and their MeasurementInputs field.
RESULT_PURPOSES = {
    "routine": "routine_nC",
    "opposite": "opposite_nC",
    "reduced": "reduced_nC",
    "return_check": "return_nC",
}
#: The plan purposes whose means are referred to the routine set's air, and their key in
#: ``MeasurementInputs.set_environments``.
AIR_KEY_OF_PURPOSE = {
    "routine": "routine",
    "opposite": "opposite",
    "reduced": "reduced",
    "return_check": "return",
}


@dataclass(frozen=True)
class SessionContext:
    """What a session was started with: plan, metadata (as stored), thresholds, and the
    integration time (s) of each reading by id. The engine keeps one for its open session."""

    plan: Plan
    metadata: Mapping[str, Any]
    thresholds: Thresholds
    integration_s: Mapping[int, float]
    #: The daemon's --time-scale (its waits were this fraction of real ones), to judge
    #: integration times against the MU delivered; 1 for a session with no such record.
    time_scale: float = 1.0
    #: Reading id -> the MU actually delivered, for deliveries that stopped short.
    actual_MU: Mapping[int, float] = field(default_factory=dict)


@dataclass(frozen=True)
class SessionEvaluation:
    """The results of one session: the Evaluation, or None and why in words.

    ``provisional``: the results include a set not yet accepted (live results only).
    """

    evaluation: Evaluation | None
    error: str | None
    provisional: bool = False

    def results(self) -> dict[str, Any] | None:
        """Return ``Evaluation.to_dict()`` (the documented JSON keys), or None."""
        return None if self.evaluation is None else self.evaluation.to_dict()


def stored_context(
    store: RecordReader, session_id: int, events: Sequence[EventRow]
) -> SessionContext:
    """Return the context a stored session was started with; InputError if the plan is bad."""
    row = store.session(session_id)
    return SessionContext(
        plan=Plan.from_dict(row.plan()),
        metadata=row.metadata(),
        thresholds=rules.session_thresholds(events),
        integration_s=rules.integration_times(events),
        time_scale=rules.recorded_time_scale(events) or 1.0,
        actual_MU=rules.actual_monitor_units(events),
    )


def evaluate_session(
    store: RecordReader,
    session_id: int,
    context: SessionContext | None = None,
    active_set_id: int | None = None,
) -> SessionEvaluation:
    """Return the session's results, computed from what is recorded (see the module docstring).

    ``context`` defaults to the stored one (:func:`stored_context`); the engine passes its own,
    which holds the same values. ``active_set_id``: the set being taken, used provisionally for
    a step that has no accepted set yet. Never raises InputError: what cannot be evaluated is
    said in ``error`` (which stage failed, and the InputError's words); nothing is written.
    """
    stage = "the stored plan cannot be read"
    try:
        if context is None:
            context = stored_context(store, session_id, store.events(session_id))
        stage = "the stored metadata cannot be used"
        metadata = validate_metadata(dict(context.metadata))
        stage = "the recorded values cannot be evaluated"
        sets, by_set = _recorded_sets(store, session_id)
        by_set = _at_planned_MU(context, sets, by_set)
        chosen = _result_sets(sets, by_set, context.plan, context.integration_s, active_set_id)
        inputs = _inputs(store, session_id, context, metadata, chosen)
        evaluation = evaluate(inputs)
        extra = _delivery_flags(context, sets, by_set, active_set_id)
        known = {flag.code for flag in evaluation.flags}
        extra = [flag for flag in extra if flag.code not in known]
        if extra:
            evaluation = replace(evaluation, flags=(*evaluation.flags, *extra))
        return SessionEvaluation(evaluation, None, chosen.provisional)
    except InputError as problem:
        return SessionEvaluation(None, f"{stage}: {problem}")


def _delivery_flags(
    context: SessionContext,
    sets: Sequence[SetRow],
    readings: Mapping[int, Sequence[ReadingRow]],
    active_set_id: int | None,
) -> list[Flag]:
    """Return the delivery flags of the sets the results use (integrations too short for the
    MU, a charge per MU far from the routine set's), as the console shows them on each set."""
    plan = context.plan
    reference = rules.routine_nC_per_MU(plan, sets, readings)
    flags: list[Flag] = []
    for index, step in enumerate(plan.steps):
        if step.purpose not in RESULT_PURPOSES:
            continue
        row, _ = _set_for(sets, index, active_set_id)
        if row is not None:
            flags += rules.delivery_flag_list(
                step, readings.get(row.id, ()), context.integration_s, context.time_scale, reference
            )
    return flags


# ------------------------------------------------------------------------------ gathering
def _set_for(
    sets: Sequence[SetRow], step_index: int, active_set_id: int | None
) -> tuple[SetRow | None, bool]:
    """Return the set that speaks for a step (its accepted one, else the active one) and
    whether it is provisional."""
    accepted = [s for s in sets if s.step_index == step_index and s.status == "accepted"]
    if accepted:
        return accepted[-1], False
    active = [s for s in sets if s.id == active_set_id and s.step_index == step_index]
    return (active[0], True) if active else (None, False)


@dataclass(frozen=True)
class _ResultSets:
    """The readings chosen for results: per purpose, the readings used and the first reading
    of the set (settling included), plus the leakage reading and its integration time (s)."""

    used: dict[str, list[ReadingRow]]
    first: dict[str, ReadingRow]
    provisional: bool
    leakage: tuple[float, float] | None


def _recorded_sets(
    store: RecordReader, session_id: int
) -> tuple[list[SetRow], dict[int, tuple[ReadingRow, ...]]]:
    """Return the session's sets and their readings by set id, read once per evaluation."""
    return store.sets(session_id), store.readings_by_set(session_id)


def _at_planned_MU(
    context: SessionContext, sets: Sequence[SetRow], by_set: dict[int, tuple[ReadingRow, ...]]
) -> dict[int, tuple[ReadingRow, ...]]:
    """Return the readings by set with each short delivery's charge referred to the planned MU
    (``corrections.delivered_mu``), so that the charge per MU and the dose use the actual MU."""
    if not context.actual_MU:
        return by_set
    steps = {row.id: context.plan.steps[row.step_index] for row in sets}
    return {
        set_id: tuple(
            replace(
                reading,
                charge_nC=charge_at_planned_MU_nC(
                    reading.charge_nC,
                    float(steps[set_id].mu_per_reading),
                    context.actual_MU[reading.id],
                ),
            )
            if reading.id in context.actual_MU
            else reading
            for reading in readings
        )
        for set_id, readings in by_set.items()
    }


def _result_sets(
    sets: Sequence[SetRow],
    by_set: Mapping[int, Sequence[ReadingRow]],
    plan: Plan,
    integration_s: Mapping[int, float],
    active: int | None,
) -> _ResultSets:
    used: dict[str, list[ReadingRow]] = {}
    first: dict[str, ReadingRow] = {}
    provisional = False
    leakage = None
    for index, step in enumerate(plan.steps):
        chosen, is_provisional = _set_for(sets, index, active)
        if chosen is None:
            continue
        own = list(by_set.get(chosen.id, []))
        counted = [r for r in own if not r.settling]
        if step.purpose in RESULT_PURPOSES and step.purpose not in used and counted:
            used[step.purpose] = counted
            first[step.purpose] = own[0]
            provisional = provisional or is_provisional
        if step.purpose == "leakage" and counted and not is_provisional and step.duration_s:
            seconds = integration_s.get(counted[-1].id, float(step.duration_s))
            leakage = (counted[-1].charge_nC, seconds)
    return _ResultSets(used, first, provisional, leakage)


def _leakage_nC(chosen: _ResultSets, integration_s: Mapping[int, float]) -> float | None:
    """Return the leakage charge over one routine reading's integration time (nC), or None."""
    routine_times = [
        integration_s[r.id] for r in chosen.used.get("routine", []) if r.id in integration_s
    ]
    if chosen.leakage is None or not routine_times:
        return None
    charge_nC, seconds = chosen.leakage
    return leakage_per_reading_nC(charge_nC, seconds, routine_times)


def entry_in_force(
    entries: Sequence[EnvironmentRow], first_reading: ReadingRow
) -> tuple[int, EnvironmentRow] | None:
    """Return (position from 1, entry) of the environment entry in force for a set.

    The entry recorded last at or before the set's first reading; when none was recorded
    before it, the session's first entry. None when the session has no entry.
    """
    if not entries:
        return None
    before = [i for i, e in enumerate(entries) if e.recorded_at <= first_reading.recorded_at]
    index = before[-1] if before else 0
    return index + 1, entries[index]


def _entry_words(position: int, entry: EnvironmentRow, first_reading: ReadingRow) -> str:
    """Return which entry a set used, in words that a replay reproduces (no clock time: the
    time is the entry's, shown from the environment log by its position)."""
    after = "" if entry.recorded_at <= first_reading.recorded_at else ", entered after the set"
    return f"entry {position}{after}"


def _set_environments(
    entries: Sequence[EnvironmentRow], first: Mapping[str, ReadingRow]
) -> tuple[dict[str, SetEnvironment], list[EnvironmentRow]]:
    """Return (per result set, the air it was taken in; the entries so used)."""
    environments: dict[str, SetEnvironment] = {}
    used: list[EnvironmentRow] = []
    for purpose, reading in first.items():
        found = entry_in_force(entries, reading)
        if found is None:
            continue
        position, entry = found
        environments[AIR_KEY_OF_PURPOSE[purpose]] = SetEnvironment(
            entry.temperature_C,
            entry.pressure_kPa,
            _entry_words(position, entry, reading),
            position,
        )
        used.append(entry)
    return environments, used


def _pressure_conversions(entries: Sequence[EnvironmentRow]) -> list[Conversion]:
    """Return the pressure conversions of the entries used, once each, oldest first."""
    seen: dict[int, EnvironmentRow] = {e.id: e for e in entries if e.pressure_unit != "kPa"}
    return [
        Conversion("pressure", e.pressure_entered, e.pressure_unit, e.pressure_kPa, "kPa")
        for _, e in sorted(seen.items())
    ]


def _inputs(
    store: RecordReader,
    session_id: int,
    context: SessionContext,
    meta: SessionMetadata,
    chosen: _ResultSets,
) -> MeasurementInputs:
    """Return the MeasurementInputs of what is recorded, with the sets ``chosen`` for results."""
    plan, times = context.plan, context.integration_s
    entries = store.environment(session_id)
    latest = entries[-1] if entries else None
    per_set, used_entries = _set_environments(entries, chosen.first)
    routine_step = next((s for s in plan.steps if s.purpose == "routine"), None)
    inputs = MeasurementInputs(
        convention=meta.convention,
        beam=meta.beam_type,
        temperature_C=latest.temperature_C if latest else None,
        pressure_kPa=latest.pressure_kPa if latest else None,
        humidity_pct=latest.humidity_pct if latest else None,
        routine_bias_V=plan.routine_bias_V,
        reduced_bias_V=plan.reduced_bias_V,
        routine_nC=tuple(r.charge_nC for r in chosen.used.get("routine", ())),
        opposite_nC=tuple(r.charge_nC for r in chosen.used.get("opposite", ())),
        reduced_nC=tuple(r.charge_nC for r in chosen.used.get("reduced", ())),
        return_nC=tuple(r.charge_nC for r in chosen.used.get("return_check", ())),
        leakage_nC=_leakage_nC(chosen, times),
        N_Dw_Gy_per_nC=meta.N_Dw_Gy_per_nC,
        k_Q=meta.k_Q,
        k_elec=meta.k_elec,
        monitor_units=float(routine_step.mu_per_reading) if routine_step else None,
        expected_cGy_per_MU=meta.expected_cGy_per_MU,
        tolerance_pct=meta.tolerance_pct,
        uncertainties=meta.uncertainties(),
        temperature_history_C=tuple(e.temperature_C for e in entries),
        pressure_history_kPa=tuple(e.pressure_kPa for e in entries),
        conversions=(
            *meta.conversions(),
            *_pressure_conversions([*used_entries, *([latest] if latest else [])]),
        ),
        thresholds=context.thresholds,
        set_environments=per_set,
        subtract_leakage=meta.subtract_leakage,
        carried=meta.carried(),
        measured_on=meta.measured_on(),
        quality=meta.quality(),
        not_measured=tuple(
            key
            for key, purpose in MEASURED_BY.items()
            if all(step.purpose != purpose for step in plan.steps)
        ),
    )
    return inputs
