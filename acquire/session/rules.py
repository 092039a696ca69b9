"""The checks behind the engine's inputs and the plan-step rules it applies.

The checks of operator input the engine needs (environment, reasons, metadata, plan), the
plan-step rules (settling, timed leakage, capture settings), the statistics and flags shown per
set, and what a session's events say about it (its thresholds, integration times). The results
themselves come from :func:`chargebook.acquire.session.evaluation.evaluate_session`.
"""

from __future__ import annotations

import itertools
import operator
from collections.abc import Mapping, Sequence
from dataclasses import fields
from pathlib import Path
from typing import Any

import numpy as np
from chargebook.acquire.protocol import FlagInfo
from chargebook.acquire.record.events import EnvironmentEntry, EventKind
from chargebook.acquire.record.store import EventRow, ReadingRow, SetRow
from chargebook.acquire.session import metadata as session_metadata
from chargebook.acquire.session.metadata import SessionMetadata
from chargebook.acquire.session.plan import COMPARED_PURPOSES, Plan, Step, load_plan
from chargebook.corrections import limits, units
from chargebook.corrections.errors import Flag, InputError
from chargebook.corrections.signs import contradicting
from chargebook.corrections.stability import (
    SET_NAMES,
    Thresholds,
    charge_per_MU_flags,
    integration_time_flags,
    set_flags,
)
from chargebook.corrections.statistics import set_statistics


# ------------------------------------------------------------------------- operator input
def check_environment(
    temperature_C: object, pressure: object, pressure_unit: str = "kPa", humidity_pct: object = None
) -> EnvironmentEntry:
    """Return an environment entry (°C, kPa, pressure as entered, unit, % RH) after range checks.

    Raises InputError naming the field as the request names it (``temperature_C``,
    ``pressure``, ``pressure_unit``, ``humidity_pct``) when a value is
    not a number or lies outside its plausible range (10–40 °C, 60–110 kPa; common practice).
    """
    temperature = float(limits.TEMPERATURE_C.check("temperature_C", temperature_C))
    pressure_kPa = float(units.pressure_kPa(pressure, pressure_unit, field="pressure"))
    humidity = None
    if humidity_pct is not None:
        humidity = float(limits.HUMIDITY_PCT.check("humidity_pct", humidity_pct))
    return EnvironmentEntry(
        temperature_C=temperature,
        pressure_kPa=pressure_kPa,
        pressure_entered=float(pressure),  # type: ignore[arg-type]
        pressure_unit=pressure_unit,
        humidity_pct=humidity,
    )


def require_reason(field: str, value: object) -> str:
    """Return ``value`` stripped; raise InputError naming ``field`` when it is empty."""
    if not isinstance(value, str) or not value.strip():
        raise InputError(field, value, "a few words saying why", "is empty")
    return value.strip()


def validate_metadata(metadata: Mapping[str, Any]) -> dict[str, Any]:
    """Return the session metadata checked by ``acquire.session.metadata``, as plain data."""
    return _session_metadata(metadata).to_dict()


def _session_metadata(metadata: Mapping[str, Any]) -> SessionMetadata:
    if not isinstance(metadata, Mapping):
        raise InputError("metadata", metadata, "a table of the session's details", "is not one")
    return session_metadata.validate_metadata(dict(metadata))


def resolve_plan(plan: Plan | str | Path | Mapping[str, Any]) -> Plan:
    """Return a Plan from a Plan, a shipped plan's name, a TOML path or a plan dict."""
    if isinstance(plan, Plan):
        return plan
    if isinstance(plan, Mapping):
        return Plan.from_dict(dict(plan))
    return load_plan(plan)


# ------------------------------------------------------------------------ plan-step rules
def timed_s(step: Step) -> float | None:
    """Return the integration time (s) of a step read without beam (leakage), else None."""
    return None if step.uses_beam else float(step.duration_s or 0.0)


def settling_wait_s(step: Step | None) -> float:
    """Return how long (s) to wait after setting the bias before the step's first reading."""
    return 0.0 if step is None else float(step.settling.wait_s)


def settling_needed(step: Step, readings: Sequence[ReadingRow], limit: int | None = None) -> bool:
    """Return True when the next reading of the set is a settling reading under the step's rule.

    The first ``discard_first`` readings settle; then, with ``until_stable_pct``, readings keep
    settling until one differs from the one before by at most that percentage, up to
    ``max_settling_readings`` (``limit`` overrides it).
    """
    rule = step.settling
    settling = [r.charge_nC for r in readings if r.settling]
    if any(not r.settling for r in readings):
        return False  # once a reading has counted, the set has settled
    most = rule.max_settling_readings if limit is None else min(limit, rule.max_settling_readings)
    if len(settling) < rule.discard_first:
        return True
    if rule.until_stable_pct is None or len(settling) >= most:
        return False
    if len(settling) < 2 or len(settling) == rule.discard_first:
        return True
    previous, latest = settling[-2], settling[-1]
    change_pct = 100.0 * abs(latest - previous) / abs(previous) if previous else float("inf")
    return change_pct > rule.until_stable_pct


# --------------------------------------------------------------------------- statistics
def _flag(code: str, message: str, severity: str = "warning") -> FlagInfo:
    return {"code": code, "message": message, "severity": severity}


def _flag_info(flag: Flag) -> FlagInfo:
    """Return a flag of ``corrections`` as the snapshot carries it."""
    return _flag(flag.code, flag.message, flag.severity)


def reading_flags(reading: ReadingRow, against_bias: bool) -> list[FlagInfo]:
    """Return the flags of one reading: instrument status, settling, and its sign against the
    bias (``against_bias``, judged by ``corrections.signs.contradicting``)."""
    flags = []
    if reading.status != "ok":
        flags.append(
            _flag("instrument_status", f"The electrometer marked this reading {reading.status}.")
        )
    if reading.settling:
        flags.append(_flag("settling", "Settling reading: kept, not used for results.", "info"))
    if against_bias:
        flags.append(
            _flag(
                "sign_against_bias",
                "This reading's sign contradicts the bias of the set: check the bias setting, "
                "the polarity switch and the cable before accepting.",
            )
        )
    return flags


def set_summary(
    purpose: str, bias_V: float, readings: Sequence[ReadingRow], thresholds: Thresholds
) -> tuple[dict[str, Any] | None, list[FlagInfo], dict[int, list[FlagInfo]]]:
    """Return (statistics, set flags, flags per reading id) of a set's non-settling readings."""
    used = [r for r in readings if not r.settling]
    against = [False] * len(readings)
    if purpose != "leakage":  # leakage carries no bias-given sign
        against = contradicting(
            np.array([r.charge_nC for r in readings]),
            np.array([r.charge_nC for r in used or readings]),  # the set's sign: as results take it
            bias_V,
            thresholds.charge_sign_for_positive_bias,
        ).tolist()
    per_reading = {
        r.id: reading_flags(r, wrong) for r, wrong in zip(readings, against, strict=True)
    }
    if not used:
        return None, [], per_reading
    try:
        stats = set_statistics(
            [r.charge_nC for r in used],
            f"{purpose} readings",
            thresholds.outlier_modified_z,
            thresholds.outlier_floor_pct,
        )
    except InputError as error:  # display never raises: say why there are no statistics
        return None, [_unsummarised(purpose, error)], per_reading
    if purpose not in COMPARED_PURPOSES:
        return _plain(stats), [], per_reading
    for index in stats.outliers:
        per_reading[used[index].id].append(
            _flag(
                "outlier",
                "This reading lies far from the others of the set (median absolute deviation "
                "test): look for a spike or an interrupted beam before accepting.",
            )
        )
    flags = [_flag_info(flag) for flag in set_flags(purpose, stats, thresholds)]
    return _plain(stats), flags, per_reading


def delivery_flags(
    step: Step | None,
    readings: Sequence[ReadingRow],
    integration_s: Mapping[int, float],
    time_scale: float,
    reference_nC_per_MU: float | None,
) -> list[FlagInfo]:
    """Return :func:`delivery_flag_list` as the snapshot's flag dicts."""
    flags = delivery_flag_list(step, readings, integration_s, time_scale, reference_nC_per_MU)
    return [_flag_info(flag) for flag in flags]


def delivery_flag_list(
    step: Step | None,
    readings: Sequence[ReadingRow],
    integration_s: Mapping[int, float],
    time_scale: float,
    reference_nC_per_MU: float | None,
) -> list[Flag]:
    """Return the flags of a beam set's delivery: integrations too short for the step's MU
    (the instrument clock's seconds divided by the daemon's ``time_scale``), and a charge per
    MU far from the routine set's (``reference_nC_per_MU``; None while there is none)."""
    if step is None or not step.uses_beam:
        return []
    used = [r for r in readings if not r.settling]
    monitor_units = float(step.mu_per_reading)
    label = SET_NAMES.get(step.purpose, step.purpose)
    times = [integration_s[r.id] / time_scale for r in used if r.id in integration_s]
    flags = integration_time_flags(label, step.purpose, times, monitor_units)
    if used and reference_nC_per_MU is not None and step.purpose != "routine":
        per_MU = sum(abs(r.charge_nC) for r in used) / len(used) / monitor_units
        flags += charge_per_MU_flags(label, step.purpose, per_MU, "routine", reference_nC_per_MU)
    return flags


def routine_nC_per_MU(
    plan: Plan, sets: Sequence[SetRow], readings: Mapping[int, Sequence[ReadingRow]]
) -> float | None:
    """Return the routine set's mean |charge| per MU (nC/MU): its accepted set's, else its
    latest set's with readings; None before there is one."""
    steps = plan.steps
    latest: tuple[list[ReadingRow], Step] | None = None
    # the accepted sets picked out in C: the daemon asks at every reading, of hundreds of sets
    statuses = map(operator.attrgetter("status"), reversed(sets))
    is_accepted = map(operator.eq, statuses, itertools.repeat("accepted"))
    accepted = itertools.compress(reversed(sets), is_accepted)
    accepted_first = itertools.chain(accepted, reversed(sets))
    for row in accepted_first:
        step = steps[row.step_index] if row.step_index < len(steps) else None
        if step is None or step.purpose != "routine" or not step.uses_beam:
            continue
        used = [r for r in readings.get(row.id, ()) if not r.settling]
        if used:
            latest = used, step
            break
    if latest is None:
        return None
    used, step = latest
    return sum(abs(r.charge_nC) for r in used) / len(used) / float(step.mu_per_reading)


def _unsummarised(purpose: str, error: InputError) -> FlagInfo:
    """Return the flag shown in place of a set's statistics that cannot be formed."""
    if purpose == "leakage":
        return _flag(
            "leakage_zero",
            "The leakage readings average exactly zero: no leakage shows at the instrument's "
            "resolution, so there is no relative spread to state.",
            "info",
        )
    return _flag(
        "statistics_unavailable",
        f"No statistics for this set ({error}): check the readings, the bias and the cable, "
        "then redo the set.",
    )


def _plain(stats: Any) -> dict[str, Any]:
    return dict(stats.to_dict())


# ----------------------------------------------------------------------------- thresholds
def recorded_time_scale(events: Sequence[EventRow]) -> float | None:
    """Return the daemon's time scale as its ``acquisition`` event recorded it (None: none did)."""
    scale: float | None = None
    for event in events:
        if event.kind == EventKind.ACQUISITION:
            scale = event.detail().get("time_scale", scale)
    return scale


def load_thresholds(path: str | Path) -> Thresholds:
    """Return stability thresholds from a TOML file of Thresholds fields (others default).

    Raises InputError naming the key for an unknown key or a value out of its range.
    """
    import tomllib

    try:
        data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError) as error:
        raise InputError("--thresholds", str(path), "a readable TOML file", str(error)) from None
    return thresholds_from_dict(data)


def thresholds_from_dict(data: Mapping[str, Any]) -> Thresholds:
    """Return Thresholds from plain data; InputError naming an unknown key."""
    known = [f.name for f in fields(Thresholds)]
    for key in data:
        if key not in known:
            raise InputError(
                f"thresholds.{key}", data[key], "one of " + ", ".join(known), "is not a threshold"
            )
    return Thresholds(**data)


def session_thresholds(events: Sequence[EventRow]) -> Thresholds:
    """Return the thresholds a session was started with (its ``thresholds`` event)."""
    for event in events:
        if event.kind == EventKind.THRESHOLDS:
            return thresholds_from_dict(event.detail())
    return Thresholds()


# ----------------------------------------------------------------------- session events
#: The event recording a delivery that stopped short, with the MU actually delivered.
SHORT_DELIVERY_EVENT = EventKind.DELIVERY_SHORT


def actual_monitor_units(events: Sequence[EventRow]) -> dict[int, float]:
    """Return reading id -> the MU actually delivered, for readings whose delivery stopped
    short (``delivery_short`` events)."""
    return {
        int(event.detail()["reading_id"]): float(event.detail()["actual_MU"])
        for event in events
        if event.kind == SHORT_DELIVERY_EVENT
    }


def integration_times(events: Sequence[EventRow]) -> dict[int, float]:
    """Return reading id -> seconds from arming to capture, from ``reading_recorded`` events."""
    times: dict[int, float] = {}
    for event in events:
        if event.kind == EventKind.READING_RECORDED:
            detail = event.detail()
            if "integration_s" in detail:
                times[int(detail["reading_id"])] = float(detail["integration_s"])
    return times
