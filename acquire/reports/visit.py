"""The report of a calibration visit: the summary across beams first, then details and review.

``show --visit`` prints these tables; ``export --visit --format html`` prints them as one
self-contained page (``reports/printed.py``: the visit id and "page n of m" on every printed
page, the review block with signature lines). Every number is the beams' evaluations' own
(``acquire/session/visit_summary.py``); nothing is computed here.
"""

from __future__ import annotations

import dataclasses

from chargebook.acquire.protocol import SEVERITY_MARKERS, by_severity
from chargebook.acquire.record import visits
from chargebook.acquire.record.review import review_words
from chargebook.acquire.record.store import EventRow, Store
from chargebook.acquire.reports.audit import review_event_words
from chargebook.acquire.reports.html import sign_off, table_html
from chargebook.acquire.reports.printed import page, review_block
from chargebook.acquire.reports.result import expanded_uncertainty_text
from chargebook.acquire.reports.sections import (
    NOT_GIVEN,
    Table,
    factors_of,
    keyed_table,
    number,
    signed,
    when,
)
from chargebook.acquire.session.visit_summary import (
    BeamSummary,
    VisitSummary,
    plan_name,
    summarize_visit,
)


def _status_text(beam: BeamSummary) -> str:
    reason = beam.state.reason
    return f"{beam.state.status}: {reason}" if reason else beam.state.status


def _verdict_text(beam: BeamSummary) -> str:
    if beam.error:
        return f"no results: {beam.error}"
    found = beam.evaluation
    if found is None:
        return NOT_GIVEN
    if found.within_tolerance is None:
        return "pending"
    return f"{beam.verdict.upper()} (±{found.tolerance_pct:g} %)"


def _flags_text(beam: BeamSummary) -> str:
    found = beam.evaluation
    if found is None or not found.flags:
        return "none" if found is not None else NOT_GIVEN
    return ", ".join(flag.code for flag in by_severity(found.flags))


def summary_table(summary: VisitSummary) -> Table:
    """Return the result of the visit: one row per beam, in the visit's order."""
    rows = []
    for beam in summary.beams:
        found = beam.evaluation
        rows.append(
            (
                str(beam.state.beam.position),
                beam.state.beam.name,
                plan_name(beam.state.beam.plan),
                _status_text(beam),
                NOT_GIVEN if beam.state.session_id is None else str(beam.state.session_id),
                NOT_GIVEN if found is None else number(found.dose_per_MU_cGy, 4),
                NOT_GIVEN if found is None else signed(found.deviation_pct, 2),
                _verdict_text(beam),
                NOT_GIVEN if found is None else expanded_uncertainty_text(found),
                _flags_text(beam),
            )
        )
    return Table(
        f"Visit {summary.visit.id}: result by beam",
        (
            "#",
            "beam",
            "plan",
            "status",
            "session",
            "dose per MU (cGy/MU)",
            "deviation (%)",
            "tolerance",
            "U",
            "flags",
        ),
        tuple(rows),
        tuple(f"beam-{beam.state.beam.id}" for beam in summary.beams),
        note="" if rows else "No beam was added to this visit.",
    )


def visit_table(summary: VisitSummary) -> Table:
    """Return what the visit was: machine, operator, when, status, review."""
    visit, meta = summary.visit, summary.visit.metadata()
    registers = meta.get("register_ids") or {}
    rows = [
        ("visit", "visit", f"{visit.id} ({visit.status})"),
        ("uuid", "visit uuid", visit.uuid),
        ("machine", "treatment machine", visit.machine),
        ("operator", "operator", str(meta.get("operator", NOT_GIVEN))),
        ("opened", "opened", when(visit.created_at)),
        ("closed", "closed", when(visit.closed_at)),
        ("reason", "closing reason", visit.reason or NOT_GIVEN),
        ("air_max_age", "air data confirmed up to", f"{meta.get('air_max_age_min', 30):g} min old"),
        ("review", "review", review_words(summary.review)),
    ]
    if registers:
        listed = ", ".join(f"{name} {row_id}" for name, row_id in sorted(registers.items()))
        rows.append(("registers", "register entries", listed))
    if meta.get("notes"):
        rows.append(("notes", "notes", str(meta["notes"])))
    return keyed_table("Visit", rows)


def flags_table(summary: VisitSummary) -> Table:
    """Return every beam's flags, the most severe first within each beam."""
    rows, keys = [], []
    for beam in summary.beams:
        if beam.evaluation is None:
            continue
        for flag in by_severity(beam.evaluation.flags):
            marker = SEVERITY_MARKERS.get(flag.severity, "!")
            rows.append((beam.state.beam.name, f"{marker} {flag.severity}", flag.message))
            keys.append(f"{beam.state.beam.id}-{flag.code}")
    return Table(
        "Flags by beam",
        ("beam", "severity", "message"),
        tuple(rows),
        tuple(keys),
        note="" if rows else "No flags.",
    )


def _event_words(event: EventRow) -> tuple[str, str]:
    detail = event.detail()
    kind = event.kind
    if kind == "visit_created":
        return "visit opened", f"at {detail.get('machine')}"
    if kind == "visit_beam_added":
        return (
            "beam added",
            f"{detail.get('position')}. {detail.get('name')} ({detail.get('plan')})",
        )
    if kind == "visit_beam_started":
        return "beam started", f"{detail.get('beam')} in session {detail.get('session_id')}"
    if kind == "visit_beam_status":
        return f"beam {detail.get('to')}", f"{detail.get('beam')}: {detail.get('reason')}"
    if kind == "visit_status":
        return f"visit {detail.get('to')}", str(detail.get("reason") or NOT_GIVEN)
    if kind == "visit_reviewed":
        return review_event_words(event, "visit")
    return kind, ""


def audit_table(events: list[EventRow]) -> Table:
    """Return the visit's own audit (beams added, measured, skipped; opened, closed, reviewed)."""
    rows = tuple((when(e.recorded_at), e.actor, *_event_words(e)) for e in events)
    return Table(
        "Audit of the visit",
        ("when", "who", "what", "detail"),
        rows,
        tuple(f"event-{e.id}" for e in events),
    )


def beam_factor_tables(summary: VisitSummary) -> list[Table]:
    """Return, for each beam with results, its MU per reading and its correction factors with
    their states and sources (a carried factor names where it came from)."""
    tables = []
    for beam in summary.beams:
        if beam.evaluation is None:
            continue
        row = beam.state.beam
        mu = NOT_GIVEN if beam.mu_per_reading is None else f"{beam.mu_per_reading:g} MU"
        title = (
            f"Beam {row.position}, {row.name} (session {beam.state.session_id}, "
            f"{plan_name(row.plan)}, {mu} per reading): correction factors"
        )
        tables.append(dataclasses.replace(factors_of(beam.evaluation), title=title))
    return tables


def visit_tables(summary: VisitSummary, events: list[EventRow]) -> list[Table]:
    """Return the visit's report as tables, the result first."""
    return [
        summary_table(summary),
        visit_table(summary),
        *beam_factor_tables(summary),
        flags_table(summary),
        audit_table(events),
    ]


def load_visit(store: Store, visit_id: int) -> tuple[VisitSummary, list[EventRow]]:
    """Return the visit's summary and its own events. Raises NotFound for no such visit."""
    return summarize_visit(store, visit_id), visits.visit_events(store, visit_id)


def visit_html(summary: VisitSummary, events: list[EventRow], generated: str) -> str:
    """Return the visit's report as one self-contained, printable HTML page: the result by
    beam first, the visit id on every printed page, the review block last."""
    visit = summary.visit
    signed = sign_off(summary.review)
    body = [table_html(table) for table in visit_tables(summary, events)]
    operator = str(visit.metadata().get("operator", NOT_GIVEN))
    body.append(review_block(operator, when(visit.created_at), signed))
    title = f"chargebook visit {visit.id}: {visit.machine}"
    running_head = f"chargebook visit {visit.id} · {visit.machine}"
    return page(title, running_head, generated, body)
