"""Live results and the checks behind the engine's inputs, all through ``corrections``.

After every change the engine asks :func:`measurement_inputs` and :func:`evaluate_inputs`
for the results so far: they gather
the readings of the accepted sets (and, provisionally, those of the set being taken for a step
that has no accepted set yet), the latest environment entry and the session metadata into a
``MeasurementInputs`` and calls ``corrections.evaluate.evaluate``. Factors not yet measured stay
*pending* there; nothing here computes physics.

Also here: the checks of operator input the engine needs (environment, reasons, metadata, plan)
and the plan-step rules the engine applies (settling, timed leakage, capture settings).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import fields, replace
from pathlib import Path
from typing import Any

from chargebook.acquire import session_meta
from chargebook.acquire.capture import CaptureSettings
from chargebook.acquire.plan import COMPARED_PURPOSES, Plan, Step, load_plan
from chargebook.acquire.session_meta import SessionMetadata
from chargebook.acquire.store import EventRow, ReadingRow, SetRow, Store
from chargebook.corrections import limits, units
from chargebook.corrections.errors import InputError
from chargebook.corrections.leakage import leakage_per_reading_nC
from chargebook.corrections.signs import contradicting
from chargebook.corrections.stability import Thresholds, set_flags
from chargebook.corrections.statistics import set_statistics
from chargebook.corrections.units import Conversion

#: The plan purposes whose accepted readings feed the results, and their MeasurementInputs field.
RESULT_PURPOSES = {"routine": "routine_nC", "opposite": "opposite_nC", "reduced": "reduced_nC"}


# ------------------------------------------------------------------------- operator input
def check_environment(
    temperature_C: object, pressure: object, pressure_unit: str = "kPa", humidity_pct: object = None
) -> dict[str, Any]:
    """Return an environment entry (°C, kPa, pressure as entered, unit, % RH) after range checks.

    Raises InputError naming the field (``temperature_C``, ``pressure_hPa`` ...) when a value is
    not a number or lies outside its plausible range (10–40 °C, 60–110 kPa; common practice).
    """
    temperature = float(limits.TEMPERATURE_C.check("temperature_C", temperature_C))
    pressure_kPa = float(units.pressure_kPa(pressure, pressure_unit))
    humidity = None
    if humidity_pct is not None:
        humidity = float(limits.HUMIDITY_PCT.check("humidity_pct", humidity_pct))
    return {
        "temperature_C": temperature,
        "pressure_kPa": pressure_kPa,
        "pressure_entered": float(pressure),  # type: ignore[arg-type]
        "pressure_unit": pressure_unit,
        "humidity_pct": humidity,
    }


def require_reason(field: str, value: object) -> str:
    """Return ``value`` stripped; raise InputError naming ``field`` when it is empty."""
    if not isinstance(value, str) or not value.strip():
        raise InputError(field, value, "a few words saying why", "is empty")
    return value.strip()


def validate_metadata(metadata: Mapping[str, Any]) -> dict[str, Any]:
    """Return the session metadata checked by ``acquire.session_meta``, as plain data."""
    return _session_metadata(metadata).to_dict()


def _session_metadata(metadata: Mapping[str, Any]) -> SessionMetadata:
    if not isinstance(metadata, Mapping):
        raise InputError("metadata", metadata, "a table of the session's details", "is not one")
    return session_meta.validate_metadata(dict(metadata))


def resolve_plan(plan: Plan | str | Path | Mapping[str, Any]) -> Plan:
    """Return a Plan from a Plan, a shipped plan's name, a TOML path or a plan dict."""
    if isinstance(plan, Plan):
        return plan
    if isinstance(plan, Mapping):
        return Plan.from_dict(dict(plan))
    return load_plan(plan)


# ------------------------------------------------------------------------ plan-step rules
#: The shortest hold time after scaling, s: a few polls of a query-mode electrometer.
MIN_SCALED_HOLD_S = 0.15


def capture_settings(plan: Plan, time_scale: float = 1.0) -> CaptureSettings:
    """Return the end-of-beam settings: the engine's defaults with the plan's overrides.

    ``time_scale`` (< 1 for a simulated electrometer running faster than real time) shortens
    the hold time, but not below MIN_SCALED_HOLD_S.
    """
    settings = CaptureSettings(**plan.capture.overrides())
    if time_scale == 1.0:
        return settings
    hold_s = max(settings.hold_s * time_scale, min(settings.hold_s, MIN_SCALED_HOLD_S))
    return replace(settings, hold_s=hold_s)


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
def _flag(code: str, message: str, severity: str = "warning") -> dict[str, str]:
    return {"code": code, "message": message, "severity": severity}


def reading_flags(reading: ReadingRow, against_bias: bool) -> list[dict[str, str]]:
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
) -> tuple[dict[str, Any] | None, list[dict[str, str]], dict[int, list[dict[str, str]]]]:
    """Return (statistics, set flags, flags per reading id) of a set's non-settling readings."""
    used = [r for r in readings if not r.settling]
    against = [False] * len(readings)
    if purpose != "leakage":  # leakage carries no bias-given sign
        against = contradicting(
            [r.charge_nC for r in readings],
            [r.charge_nC for r in used or readings],  # the set's sign: as the results take it
            bias_V,
            thresholds.charge_sign_for_positive_bias,
        ).tolist()
    per_reading = {
        r.id: reading_flags(r, wrong) for r, wrong in zip(readings, against, strict=True)
    }
    if not used:
        return None, [], per_reading
    try:
        stats = set_statistics([r.charge_nC for r in used], field=f"{purpose} readings")
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
    flags = [flag.to_dict() for flag in set_flags(purpose, stats, thresholds)]
    return _plain(stats), flags, per_reading


def _unsummarised(purpose: str, error: InputError) -> dict[str, str]:
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
THRESHOLDS_EVENT = "thresholds"
#: The event that records, at session start, the instrument profile and the daemon's time scale
#: (what a replay needs to read the traffic and to time the plan's waits as the daemon did).
ACQUISITION_EVENT = "acquisition"


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
            raise InputError(f"thresholds.{key}", data[key], "one of " + ", ".join(known))
    return Thresholds(**data)


def session_thresholds(events: Sequence[EventRow]) -> Thresholds:
    """Return the thresholds a session was started with (its ``thresholds`` event)."""
    for event in events:
        if event.kind == THRESHOLDS_EVENT:
            return thresholds_from_dict(event.detail())
    return Thresholds()


# ------------------------------------------------------------------------------ results
def integration_times(events: Sequence[EventRow]) -> dict[int, float]:
    """Return reading id -> seconds from arming to capture, from ``reading_recorded`` events."""
    times: dict[int, float] = {}
    for event in events:
        if event.kind == "reading_recorded":
            detail = event.detail()
            if "integration_s" in detail:
                times[int(detail["reading_id"])] = float(detail["integration_s"])
    return times


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


def measurement_inputs(
    store: Store,
    session_id: int,
    plan: Plan,
    metadata: Mapping[str, Any],
    active_set_id: int | None,
    integration_s: Mapping[int, float],
    thresholds: Thresholds | None = None,
) -> tuple[Any, bool]:
    """Return (MeasurementInputs of what is known, provisional?) for the session."""
    from chargebook.corrections.evaluate import MeasurementInputs

    sets = store.sets(session_id)
    readings = store.readings(session_id)
    by_set: dict[int, list[ReadingRow]] = {}
    for reading in readings:
        by_set.setdefault(reading.set_id, []).append(reading)
    values: dict[str, list[float]] = {}
    provisional = False
    leakage_nC = None
    routine_times: list[float] = []
    for index, step in enumerate(plan.steps):
        chosen, is_provisional = _set_for(sets, index, active_set_id)
        if chosen is None:
            continue
        used = [r for r in by_set.get(chosen.id, []) if not r.settling]
        field = RESULT_PURPOSES.get(step.purpose)
        if field is not None and field not in values and used:
            values[field] = [r.charge_nC for r in used]
            provisional = provisional or is_provisional
            if step.purpose == "routine":
                routine_times = [integration_s[r.id] for r in used if r.id in integration_s]
        if step.purpose == "leakage" and used and not is_provisional and step.duration_s:
            seconds = integration_s.get(used[-1].id, float(step.duration_s))
            leakage_nC = (used[-1].charge_nC, seconds)
    environment = store.environment(session_id)
    latest = environment[-1] if environment else None
    leakage = None
    if leakage_nC is not None and routine_times:
        leakage = leakage_per_reading_nC(leakage_nC[0], leakage_nC[1], routine_times)
    meta = _session_metadata(metadata)
    conversions = list(meta.conversions())
    if latest is not None and latest.pressure_unit != "kPa":
        conversions.append(
            Conversion(
                "pressure",
                latest.pressure_entered,
                latest.pressure_unit,
                latest.pressure_kPa,
                "kPa",
            )
        )
    routine_step = next((s for s in plan.steps if s.purpose == "routine"), None)
    inputs = MeasurementInputs(
        convention=meta.convention,
        beam=meta.beam_type,
        temperature_C=latest.temperature_C if latest else None,
        pressure_kPa=latest.pressure_kPa if latest else None,
        humidity_pct=latest.humidity_pct if latest else None,
        routine_bias_V=plan.routine_bias_V,
        reduced_bias_V=plan.reduced_bias_V,
        routine_nC=tuple(values.get("routine_nC", ())),
        opposite_nC=tuple(values.get("opposite_nC", ())),
        reduced_nC=tuple(values.get("reduced_nC", ())),
        leakage_nC=leakage,
        N_Dw_Gy_per_nC=meta.N_Dw_Gy_per_nC,
        k_Q=meta.k_Q,
        k_elec=meta.k_elec,
        monitor_units=float(routine_step.mu_per_reading) if routine_step else None,
        expected_cGy_per_MU=meta.expected_cGy_per_MU,
        tolerance_pct=meta.tolerance_pct,
        uncertainties=meta.uncertainties(),
        temperature_history_C=tuple(e.temperature_C for e in environment),
        pressure_history_kPa=tuple(e.pressure_kPa for e in environment),
        conversions=tuple(conversions),
        thresholds=thresholds or Thresholds(),
    )
    return inputs, provisional


def evaluate_inputs(inputs: Any) -> tuple[dict[str, Any] | None, str | None]:
    """Return (``evaluate(inputs).to_dict()``, None), or (None, why) in words.

    When the recorded values cannot be evaluated (``evaluate`` raises InputError, e.g. readings
    whose sign contradicts the bias) the results are None and the error says why; nothing
    recorded is touched.
    """
    from chargebook.corrections.evaluate import evaluate

    try:
        return evaluate(inputs).to_dict(), None
    except InputError as error:
        return None, f"The results cannot be computed: {error}"
