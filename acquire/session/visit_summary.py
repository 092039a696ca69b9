"""The summary of a calibration visit across its beams: each beam's status and result.

For each beam, in the visit's order: its plan, its status (planned, measuring, measured,
unfinished, skipped) and why, its latest session, and that session's results as
``evaluate_session`` computes them (dose per MU, deviation from the expected output, pass or
fail against the tolerance, the expanded uncertainty, the flags). Nothing is computed here:
the numbers are the evaluation's. The console (through the daemon's snapshot), ``show
--visit`` and the visit's report all read this one summary.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from chargebook.acquire.record import visits
from chargebook.acquire.record.migrations import SESSION_FINAL_STATUSES
from chargebook.acquire.record.review import VISIT_REVIEW_EVENT, Review, review_of
from chargebook.acquire.record.store import Store
from chargebook.acquire.session.evaluation import evaluate_session
from chargebook.acquire.session.plan import Plan
from chargebook.corrections.evaluate import Evaluation

#: Pass or fail in one word, from ``Evaluation.within_tolerance`` (None: not known yet).
VERDICTS = {True: "pass", False: "fail", None: "pending"}


@dataclass(frozen=True)
class BeamSummary:
    """One beam of a visit as it stands, with its latest session's evaluation (if any)."""

    state: visits.BeamState
    evaluation: Evaluation | None
    error: str | None  # why the session's results cannot be computed
    mu_per_reading: float | None = None  # of the session's compared steps, as measured

    @property
    def verdict(self) -> str:
        """Return pass, fail or pending (no evaluation or no deviation yet)."""
        if self.evaluation is None:
            return VERDICTS[None]
        return VERDICTS[self.evaluation.within_tolerance]

    def to_dict(self) -> dict[str, Any]:
        """Return the beam's line of the summary as JSON-ready data."""
        beam, found = self.state.beam, self.evaluation
        return {
            "beam_id": beam.id,
            "position": beam.position,
            "name": beam.name,
            "plan": plan_name(beam.plan),
            "plan_source": beam.plan,
            "register_ids": beam.register_ids(),
            "status": self.state.status,
            "reason": self.state.reason,
            "session": self.state.session_id,
            "sessions": list(self.state.sessions),
            "dose_per_MU_cGy": None if found is None else found.dose_per_MU_cGy,
            "deviation_pct": None if found is None else found.deviation_pct,
            "tolerance_pct": None if found is None else found.tolerance_pct,
            "U_expanded_pct": None if found is None else found.U_expanded_pct,
            "mu_per_reading": self.mu_per_reading,
            "verdict": self.verdict,
            "flags": [] if found is None else [flag.to_dict() for flag in found.flags],
            "results_error": self.error,
        }


@dataclass(frozen=True)
class VisitSummary:
    """A visit, its beams in order with their results, and its review (None: unreviewed)."""

    visit: visits.VisitRow
    beams: tuple[BeamSummary, ...]
    review: Review | None

    def to_dict(self) -> dict[str, Any]:
        """Return the summary as JSON-ready data (the snapshot's ``visit`` and ``show``)."""
        visit = self.visit
        return {
            "id": visit.id,
            "uuid": visit.uuid,
            "machine": visit.machine,
            "metadata": visit.metadata(),
            "status": visit.status,
            "created_at": visit.created_at,
            "closed_at": visit.closed_at,
            "reason": visit.reason,
            "beams": [beam.to_dict() for beam in self.beams],
            "review": None if self.review is None else self.review.to_dict(),
        }


def plan_name(plan: str) -> str:
    """Return a plan as a beam shows it: a shipped plan's name, or a plan file's stem."""
    return Path(plan).stem if plan.endswith(".toml") else plan


#: A closed session's results, kept by the caller between summaries: (evaluation, error,
#: MU per reading) by session id.
ClosedResults = dict[int, tuple[Evaluation | None, str | None, float | None]]


def summarize_visit(
    store: Store, visit_id: int, closed: ClosedResults | None = None
) -> VisitSummary:
    """Return the visit's summary across its beams. Raises ``NotFound`` for no such visit.

    ``closed``: results of sessions already closed for good, kept by the caller (the daemon
    summarizes the visit after every reading); they are used as they are, and the sessions
    closed since are added to it.
    """
    visit = visits.visit(store, visit_id)
    closed = {} if closed is None else closed
    beams = []
    for state in visits.beam_states(store, visit_id):
        session_id = state.session_id
        if session_id is None:
            beams.append(BeamSummary(state, None, None))
            continue
        if session_id not in closed:
            session = store.session(session_id)
            found = evaluate_session(store, session_id)
            mu = Plan.from_dict(session.plan()).result_mu_per_reading()
            if session.status not in SESSION_FINAL_STATUSES:
                beams.append(BeamSummary(state, found.evaluation, found.error, mu))
                continue
            closed[session_id] = (found.evaluation, found.error, mu)
        beams.append(BeamSummary(state, *closed[session_id]))
    review = review_of(visits.visit_events(store, visit_id), VISIT_REVIEW_EVENT)
    return VisitSummary(visit, tuple(beams), review)
