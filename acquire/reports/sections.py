"""The sections of a session report, as tables of formatted text, for every output format.

``show`` prints them as text and ``export --format html`` renders them as HTML, so both say the
same thing in the same words. Every number comes from the stored raw values or from the
session's :class:`~chargebook.corrections.evaluate.Evaluation`; nothing is computed here but
formatting. A row may carry a ``key`` (a result key such as ``dose_per_MU_cGy``) so that a
machine reading the HTML can find a figure.
"""

from __future__ import annotations

import contextlib
import functools
import json
from collections.abc import Sequence
from typing import Any

from chargebook.acquire.protocol import SEVERITY_MARKERS, by_severity
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.review import review_words
from chargebook.acquire.reports.audit import event_words
from chargebook.acquire.reports.data import SessionRecord, SetRecord
from chargebook.acquire.reports.summary_text import SET_NAMES, boag_text, leakage_text, set_air_rows
from chargebook.acquire.reports.table import (
    NOT_GIVEN,
    PENDING,
    Table,
    number,
    signed,
    when,
)
from chargebook.acquire.session.metadata import action_level_pct
from chargebook.acquire.session.numbering import reading_labels
from chargebook.corrections.beam_quality import quality_text
from chargebook.corrections.conventions import constants
from chargebook.corrections.errors import InputError
from chargebook.corrections.evaluate import Evaluation
from chargebook.corrections.statistics import SetSpread, set_spread
from chargebook.corrections.student_t import dof_text
from chargebook.corrections.uncertainty import CERTIFICATE_COVERAGE_FACTOR


def keyed_table(
    title: str, rows: Sequence[tuple[str, str, str]], note: str = "", **extra: Any
) -> Table:
    """Return a two-column (item, value) table from (key, label, value) rows."""
    return Table(
        title,
        ("item", "value"),
        tuple((label, value) for _, label, value in rows),
        tuple(key for key, _, _ in rows),
        note=note,
        extra=extra,
    )


@functools.lru_cache(maxsize=1024)
def set_stats(record: SetRecord) -> SetSpread | None:
    """Return the mean and relative SD of a set's used readings, all a report shows of a set
    (None when there are none to judge); computed once per set, although its table row and its
    figure both show them."""
    charges = [r.charge_nC for r in record.used]
    if not charges:
        return None
    try:
        return set_spread(charges, f"set {record.row.id} readings")
    except InputError:
        return None  # e.g. a leakage set that averages exactly zero


# ------------------------------------------------------------------------------ sections


def _register_rows(meta: dict) -> list[tuple[str, str, str]]:
    """Return the rows saying which register rows the session used (as copied when it
    started) and the warnings they raised; none for a session typed in."""
    copy = meta.get("register_copy")
    if not copy:
        return []
    used = "; ".join(
        f"{kind} {row.get('name')} (row {row.get('id')})" for kind, row in copy.items()
    )
    warnings = meta.get("register_warnings") or []
    return [
        ("From the registers", used, "registers"),
        ("Register warnings", "; ".join(warnings) or "none", "register_warnings"),
    ]


def identity(record: SessionRecord) -> Table:
    """Return who measured what, with what, under which code of practice."""
    meta = record.metadata
    session = record.session
    convention = session.convention
    with contextlib.suppress(InputError):
        convention = constants(meta.get("convention", convention)).title
    rows = [
        ("Session", f"{session.id} ({session.status})", "session"),
        ("Started", when(session.created_at), "created_at"),
        ("Closed", when(session.closed_at), "closed_at"),
        ("Treatment machine", str(meta.get("treatment_machine", NOT_GIVEN)), "treatment_machine"),
        ("Beam", f"{meta.get('beam', session.beam)} ({meta.get('beam_type', '?')})", "beam"),
        ("Code of practice", convention, "convention"),
        ("Chamber", _pair(meta, "chamber_model", "chamber_serial"), "chamber"),
        ("Electrometer", _pair(meta, "electrometer_model", "electrometer_serial"), "electrometer"),
        ("Operator", str(meta.get("operator", NOT_GIVEN)), "operator"),
        ("Plan", record.plan.name if record.plan else NOT_GIVEN, "plan"),
        ("Instrument as identified", _instrument_text(record.instrument), "instrument"),
        ("Raw instrument lines kept", str(record.traffic_lines), "traffic_lines"),
    ]
    if session.reason:
        rows.insert(3, ("Reason", session.reason, "reason"))
    if session.replay_of is not None:
        rows.insert(3, ("Replay of session", _replay_text(record), "replay_of"))
    rows[1:1] = [
        ("Review", _review_text(record), "review"),
        ("Session UUID", session.uuid or NOT_GIVEN, "session_uuid"),
        ("Station", _station_text(record), "station"),
    ]
    for label, name in (("Beam quality", "beam_quality"), ("Notes", "notes")):
        if meta.get(name):
            rows.append((label, str(meta[name]), name))
    rows += _register_rows(meta)
    electron = _electron_text(record)
    if electron is not None:
        rows.append(("Electron beam", electron, "beam_quality_text"))
    return Table(
        "Session",
        ("item", "value"),
        tuple((label, value) for label, value, _ in rows),
        tuple(key for _, _, key in rows),
    )


def _station_text(record: SessionRecord) -> str:
    station = record.station
    return NOT_GIVEN if station is None else f"{station.name}, UUID {station.uuid}"


def _replay_text(record: SessionRecord) -> str:
    """Return the session a replay is of, saying so when the replay was kept although its
    traffic log does not reproduce that session (its ``replay_not_reproduced`` event)."""
    text = str(record.session.replay_of)
    for event in record.events:
        if event.kind == EventKind.REPLAY_NOT_REPRODUCED:
            log = event.detail()["traffic_log"]
            return f"{text}, NOT reproduced: traffic log {log} differs, kept with --keep"
    return text


def _review_text(record: SessionRecord) -> str:
    review = record.review
    words = review_words(review)
    return words if review is None else f"{words}: {review.comment}"


def _pair(meta: dict[str, Any], model: str, serial: str) -> str:
    return f"{meta.get(model, NOT_GIVEN)}, serial {meta.get(serial, NOT_GIVEN)}"


def _electron_text(record: SessionRecord) -> str | None:
    """Return "R50 = 4.2 cm, z_ref = 2.42 cm; plane-parallel chamber" for an electron beam."""
    if record.evaluation is None:
        return None
    quality = record.evaluation.quality
    text = quality_text(quality)
    return None if text is None else f"{text}; {quality.chamber_type} chamber"


def _instrument_text(detail: dict[str, Any] | None) -> str:
    if not detail:
        return "not recorded"
    parts = [f"{key} {value}" for key, value in detail.items() if key != "raw" and value]
    return ", ".join(parts) if parts else json.dumps(detail, ensure_ascii=False)


def calibration(record: SessionRecord) -> Table:
    """Return the calibration data as entered, with units and uncertainties."""
    meta = record.metadata
    rows = [
        ("N_D,w as entered", f"{meta.get('N_Dw', NOT_GIVEN)} {meta.get('N_Dw_unit', '')}"),
        ("N_D,w", f"{meta.get('N_Dw_Gy_per_nC', NOT_GIVEN)} Gy/nC"),
        (
            f"U(N_D,w), k = {meta.get('k_N_Dw') or CERTIFICATE_COVERAGE_FACTOR:g}",
            _percent(meta.get("u_N_Dw_pct_k2")),
        ),
        ("Calibration date", str(meta.get("calibration_date") or NOT_GIVEN)),
        ("Certificate", str(meta.get("certificate") or NOT_GIVEN)),
        ("k_Q", str(meta.get("k_Q", NOT_GIVEN))),
        ("u(k_Q)", _percent(meta.get("u_k_Q_pct"))),
        ("k_elec", str(meta.get("k_elec") if meta.get("k_elec") is not None else "not entered")),
        ("Expected output", f"{meta.get('expected_cGy_per_MU', NOT_GIVEN)} cGy/MU"),
    ]
    keys = (
        "N_Dw",
        "N_Dw_Gy_per_nC",
        "u_N_Dw_pct_k2",
        "calibration_date",
        "certificate",
        "k_Q",
        "u_k_Q_pct",
        "k_elec",
        "expected_cGy_per_MU",
    )
    return Table("Calibration", ("item", "value"), tuple(rows), keys)


def _percent(value: object) -> str:
    return NOT_GIVEN if value is None else f"{value} %"


def environment(record: SessionRecord) -> Table:
    """Return every environment entry, oldest first, with the sets whose air it gave."""
    results = record.evaluation.to_dict() if record.evaluation else {}
    used_by: dict[int, list[str]] = {}
    for key, air in (results.get("set_air") or {}).items():
        used_by.setdefault(air.get("entry"), []).append(SET_NAMES.get(key, key))
    rows = tuple(
        (
            when(e.recorded_at),
            f"{e.temperature_C:.2f}",
            f"{e.pressure_kPa:.3f}",
            f"{e.pressure_entered:g} {e.pressure_unit}",
            number(e.humidity_pct, 0, NOT_GIVEN),
            e.source,
            str(position),
            ", ".join(used_by.get(position, [])) or NOT_GIVEN,
        )
        for position, e in enumerate(record.environment, start=1)
    )
    return Table(
        "Environment",
        ("recorded", "T (°C)", "P (kPa)", "P as entered", "RH (%)", "source", "entry", "air of"),
        rows,
        tuple(f"environment-{e.id}" for e in record.environment),
        note="Each set's mean is corrected to reference air with the entry in force when the "
        "set was taken (the entry recorded last before its first reading); the routine set's "
        "gives k_TP."
        if rows
        else "No environment entry was recorded: the air-density correction is pending.",
    )


def reading_sets(record: SessionRecord) -> Table:
    """Return one row per reading set, superseded and aborted attempts included."""
    rows = []
    for reading_set in record.sets:
        row = reading_set.row
        stats = set_stats(reading_set)
        settling = len(reading_set.readings) - len(reading_set.used)
        rows.append(
            (
                str(row.step_index + 1),
                row.step_key,
                row.purpose,
                f"{row.bias_V:+g} V",
                mu_per_reading_text(record, row.step_index),
                str(row.attempt),
                row.status,
                f"{len(reading_set.used)}" + (f" (+{settling} settling)" if settling else ""),
                number(stats.mean_nC if stats else None, 4, NOT_GIVEN),
                number(stats.relative_sd_pct if stats else None, 3, NOT_GIVEN),
                row.reason or "",
            )
        )
    return Table(
        "Reading sets",
        (
            "step",
            "key",
            "purpose",
            "bias",
            "MU per reading",
            "attempt",
            "status",
            "readings",
            "mean (nC)",
            "rel. SD (%)",
            "reason",
        ),
        tuple(rows),
        tuple(f"set-{s.row.id}" for s in record.sets),
        note="Only accepted sets are used for results; settling readings are kept, not used. "
        "MU per reading: as the plan asks for each delivery.",
    )


def mu_per_reading_text(record: SessionRecord, step_index: int) -> str:
    """Return the MU per reading the plan sets for a step ("100 MU", "beam off", or "—")."""
    plan = record.plan
    if plan is None or not 0 <= step_index < len(plan.steps):
        return NOT_GIVEN
    step = plan.steps[step_index]
    return "beam off" if step.purpose == "leakage" else f"{step.mu_per_reading:g} MU"


READING_HEADERS = (
    "set", "key", "reading", "charge (nC)", "capture", "settling", "status", "t (s)", "recorded"
)  # fmt: skip


def readings(record: SessionRecord) -> Table:
    """Return every reading as stored, set by set, settling readings marked."""
    labels = {
        reading.id: label
        for reading_set in record.sets
        for reading, label in zip(
            reading_set.readings,
            reading_labels(r.settling for r in reading_set.readings),
            strict=True,
        )
    }
    rows = tuple(
        (
            str(reading_set.row.id),
            reading_set.row.step_key,
            labels[reading.id],
            f"{reading.charge_nC:+.4f}",
            reading.capture,
            "settling" if reading.settling else "",
            reading.status,
            f"{reading.t_s:.2f}",
            when(reading.recorded_at),
        )
        for reading_set in record.sets
        for reading in reading_set.readings
    )
    keys = tuple(f"reading-{r.id}" for s in record.sets for r in s.readings)
    return Table(
        "Readings",
        (
            "set",
            "key",
            "reading",
            "charge (nC)",
            "capture",
            "settling",
            "status",
            "t (s)",
            "recorded",
        ),
        rows,
        keys,
        note="" if rows else "No reading was recorded.",
    )


def factors(record: SessionRecord) -> Table:
    """Return the correction factors with their symbols, states and sources."""
    return factors_of(record.evaluation, _no_results(record))


def factors_of(evaluation: Evaluation | None, missing: str = "No results.") -> Table:
    """Return an evaluation's correction factors (``missing``: the note when there is none)."""
    if evaluation is None:
        return Table("Correction factors", ("symbol", "value"), (), note=missing)
    rows = tuple(
        (
            factor.symbol,
            number(factor.value, 5),
            factor.state,
            number(factor.u_rel_pct, 3, NOT_GIVEN),
            factor.source,
        )
        for factor in evaluation.factors.values()
    )
    return Table(
        "Correction factors",
        ("symbol", "value", "state", "u (%)", "source"),
        rows,
        tuple(evaluation.factors),
        note=(
            "A pending factor is not yet known: results that need it are not shown."
            if any(factor.value is None for factor in evaluation.factors.values())
            else ""
        ),
    )


def action_level_text(metadata: dict[str, Any]) -> str:
    """Return the session's action level in words: "±3 %", or that the record sets none."""
    action = action_level_pct(metadata)
    return "not set in this record" if action is None else f"±{action:g} %"


def results(record: SessionRecord) -> Table:
    """Return charge, dose, dose per MU, deviation and uncertainty."""
    evaluation = record.evaluation
    if evaluation is None:
        return Table("Results", ("quantity", "value"), (), note=_no_results(record))
    symbols = evaluation.symbols
    within = {None: PENDING, True: "yes", False: "NO"}[evaluation.within_tolerance]
    rows = [
        ("M_raw_nC", f"{symbols['M_raw']} (nC)", number(evaluation.M_raw_nC, 4)),
        ("M_corrected_nC", f"{symbols['M_corrected']} (nC)", number(evaluation.M_corrected_nC, 4)),
        ("dose_Gy", f"{symbols['dose']} (Gy)", number(evaluation.dose_Gy, 5)),
        ("dose_per_MU_cGy", "dose per MU (cGy/MU)", number(evaluation.dose_per_MU_cGy, 4)),
        ("expected_cGy_per_MU", "expected (cGy/MU)", number(evaluation.expected_cGy_per_MU, 4)),
        ("deviation_pct", "deviation (%)", signed(evaluation.deviation_pct, 2)),
        (
            "tolerance_pct",
            "tolerance (%)",
            f"±{evaluation.tolerance_pct:g} ({evaluation.tolerance_source})",
        ),
        ("within_tolerance", "within tolerance", within),
        ("action_level_pct", "action level (%)", action_level_text(record.metadata)),
        (
            "u_combined_pct",
            "combined standard uncertainty u_c (%)",
            number(evaluation.u_combined_pct, 2),
        ),
        (
            "U_expanded_pct",
            "expanded uncertainty U = k u_c (%)",
            number(evaluation.U_expanded_pct, 2),
        ),
        (
            "coverage_factor",
            "coverage factor k (Student's t)",
            number(evaluation.coverage_factor, 3),
        ),
        (
            "effective_dof",
            "effective degrees of freedom ν_eff",
            dof_text(evaluation.effective_dof),
        ),
        (
            "coverage_probability",
            "coverage probability (%)",
            f"{100 * evaluation.coverage_probability:g}",
        ),
    ]
    found = evaluation.to_dict()
    rows.append(("leakage_pct", "leakage", leakage_text(found)))
    boag = boag_text(found)
    if boag is not None:
        rows.append(("k_s_boag", f"{symbols['k_s']} cross-check", boag))
    times = {i: when(e.recorded_at) for i, e in enumerate(record.environment, start=1)}
    rows += [
        (f"set_air-{key}", f"air of the {name} set", text)
        for key, (name, text) in zip(found["set_air"], set_air_rows(found, times), strict=True)
    ]
    conversions = "; ".join(c.text() for c in evaluation.conversions)
    return Table(
        "Results",
        ("quantity", "value"),
        tuple((label, value) for _, label, value in rows),
        tuple(key for key, _, _ in rows),
        note=f"Unit conversions: {conversions}." if conversions else "",
    )


def budget(record: SessionRecord) -> Table:
    """Return the uncertainty budget (GUM), one line per component."""
    return budget_of(record.evaluation, _no_results(record))


def budget_of(evaluation: Evaluation | None, missing: str = "No results.") -> Table:
    """Return an evaluation's uncertainty budget (``missing``: the note when there is none)."""
    if evaluation is None or not evaluation.budget:
        return Table("Uncertainty budget", ("component", "u (%)"), (), note=missing)
    rows = tuple(
        (c.component, number(c.u_rel_pct, 3, NOT_GIVEN), c.source) for c in evaluation.budget
    )
    return Table(
        "Uncertainty budget",
        ("component", "relative u (%)", "source"),
        rows,
        tuple(f"budget-{i}" for i in range(len(rows))),
        note=(
            "Standard uncertainties combined in quadrature (JCGM 100:2008); U = k u_c, k from "
            "Student's t at ν_eff (Welch–Satterthwaite, JCGM 100:2008 G.4)."
            + _monte_carlo_note(evaluation)
        ),
    )


def _monte_carlo_note(evaluation: Any) -> str:
    """Return the Monte Carlo cross-check in words, or nothing before u_c is known."""
    if evaluation.u_combined_pct is None:
        return ""
    check = evaluation.monte_carlo()
    return (
        f" Monte Carlo check (JCGM 101:2008, {check.trials} draws, seed {check.seed}): "
        f"{check.note}."
    )


def flags(record: SessionRecord) -> Table:
    """Return the flags raised on the results, in words, the most severe first."""
    return flags_of(record.evaluation, _no_results(record))


def flags_of(evaluation: Evaluation | None, missing: str = "No results.") -> Table:
    """Return an evaluation's flags, the most severe first (``missing``: when there is none)."""
    if evaluation is None:
        return Table("Flags", ("severity", "message"), (), note=missing)
    ordered = by_severity(evaluation.flags)
    rows = tuple(
        (f"{SEVERITY_MARKERS.get(f.severity, '!')} {f.severity}", f.message) for f in ordered
    )
    return Table(
        "Flags",
        ("severity", "message"),
        rows,
        tuple(f.code for f in ordered),
        note="" if rows else "No flags.",
    )


def audit(record: SessionRecord) -> Table:
    """Return the audit of redos, aborts, manual steps and status changes, oldest first, in
    words: "Step 6, return-to-start check: redone" (steps numbered from 1, as the console)."""
    audited = record.audit()
    rows = [(when(e.recorded_at), e.actor, *event_words(record, e)) for e in audited]
    keys = [f"event-{e.id}" for e in audited]
    manual = record.manual_readings
    recorded_by = {  # who captured each reading: decoded only when one was captured by hand
        e.detail().get("reading_id"): e.actor
        for e in (record.events if manual else ())
        if e.kind == EventKind.READING_RECORDED
    }
    for reading_set, reading in manual:
        rows.append(
            (
                when(reading.recorded_at),
                recorded_by.get(reading.id, "not recorded"),
                "manual capture",
                f"{reading.charge_nC:+.4f} nC in set {reading_set.id} ({reading_set.step_key})",
            )
        )
        keys.append(f"reading-{reading.id}")
    order = sorted(range(len(rows)), key=lambda i: rows[i][0])
    return Table(
        "Audit: redos, manual steps and status changes",
        ("when", "who", "what", "detail"),
        tuple(rows[i] for i in order),
        tuple(keys[i] for i in order),
        note="" if rows else "No redo, manual step or status change was recorded.",
    )


def _no_results(record: SessionRecord) -> str:
    return f"No results: {record.results_error}" if record.results_error else "No results."


def all_sections(record: SessionRecord) -> list[Table]:
    """Return every section of the session report, in reading order."""
    return [
        identity(record),
        calibration(record),
        environment(record),
        reading_sets(record),
        readings(record),
        factors(record),
        results(record),
        budget(record),
        flags(record),
        audit(record),
    ]
