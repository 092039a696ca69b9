"""The audit of a session in words: "Step 6, return-to-start check: redone, reason ...".

Steps are numbered from 1, as the console numbers them, and named by their purpose in words;
each event says what happened and why, never as stored keys (``step_index: 5``).
"""

from __future__ import annotations

from typing import Any

from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.review import review_of, reviewer_words
from chargebook.acquire.record.store import EventRow
from chargebook.acquire.reports.data import SessionRecord

#: A plan step's purpose, in words.
PURPOSE_WORDS = {
    "leakage": "leakage",
    "warmup": "pre-irradiation",
    "routine": "routine setting",
    "opposite": "opposite polarity",
    "reduced": "reduced bias",
    "return_check": "return-to-start check",
}
#: What a set's final status means for its step.
SET_OUTCOMES = {"superseded": "redone", "aborted": "abandoned", "interrupted": "interrupted"}


def step_words(step_index: int, purpose: str) -> str:
    """Return a step as the console names it: "Step 6, return-to-start check" (from 1)."""
    return f"Step {step_index + 1}, {PURPOSE_WORDS.get(purpose, purpose.replace('_', ' '))}"


def _step_of(record: SessionRecord, step_index: int | None, step_key: str) -> str:
    if step_index is None:
        return step_key
    plan = record.plan
    purpose = (
        plan.steps[step_index].purpose if plan and 0 <= step_index < len(plan.steps) else step_key
    )
    return step_words(step_index, purpose)


def _volts(value: Any) -> str:
    return f"{float(value):+g} V" if isinstance(value, int | float) else str(value)


def _reason(reason: Any) -> str:
    return f"reason: {reason}" if reason else "no reason given"


def event_words(record: SessionRecord, event: EventRow) -> tuple[str, str]:
    """Return (what happened, its detail) for one audit event, in words."""
    detail = event.detail()
    kind = event.kind
    if kind == EventKind.SET_STATUS:
        row = record.set_rows.get(detail.get("set_id"))
        step = (
            _step_of(record, row.step_index, row.step_key)
            if row
            else str(detail.get("step_key", "?"))
        )
        outcome = SET_OUTCOMES.get(detail.get("to"), str(detail.get("to")))
        return (
            f"{step}: {outcome}",
            f"attempt {detail.get('attempt', '?')} (set {detail.get('set_id')}) "
            f"{detail.get('to')}, {_reason(detail.get('reason'))}",
        )
    if kind == EventKind.STEP_SKIPPED:
        step = _step_of(record, detail.get("step_index"), str(detail.get("step_key", "?")))
        return f"{step}: skipped", "the optional step was not taken"
    if kind == EventKind.SESSION_RESUMED:
        step = _step_of(record, detail.get("step_index"), "?")
        return "session resumed", f"at {step}"
    if kind == EventKind.SESSION_STATUS:
        return (
            f"session {detail.get('to')}",
            f"was {detail.get('from')}, {_reason(detail.get('reason'))}",
        )
    if kind == EventKind.MANUAL_STEP_DONE:
        action = (
            f"bias set to {_volts(detail['volts'])}"
            if detail.get("action") == "set_bias" and "volts" in detail
            else str(detail.get("action", "manual step"))
        )
        note = f"; note: {detail['note']}" if detail.get("note") else ""
        return "manual step done by hand", action + note
    if kind == EventKind.BIAS_CHANGED:
        return "bias changed by hand", f"to {_volts(detail.get('volts'))}"
    if kind == EventKind.READING_DROPPED:
        charge = detail.get("charge_nC")
        value = f" ({charge:+.4f} nC)" if isinstance(charge, int | float) else ""
        return "reading dropped", f"{detail.get('why', 'no reason given')}{value}"
    if kind == EventKind.DAEMON_RESTARTED:
        previous = detail.get("previous_run", "unknown")
        stop = f" ({detail['previous_stop']})" if detail.get("previous_stop") else ""
        return "daemon restarted", f"the previous run {previous}{stop}"
    if kind == EventKind.DAEMON_STOPPED:
        return "daemon stopped", _reason(detail.get("reason"))
    if kind == EventKind.UNRECORDED_LINES_RECOVERED:
        lines = detail.get("lines")
        return "raw lines recovered", (
            f"{lines} raw line{'' if lines == 1 else 's'} read before the daemon's last stop, "
            "while the record could not commit, recorded at the next start from "
            f"{detail.get('file')}; no reading was derived from them"
        )
    if kind == EventKind.BENCH_REFUSED:
        number, set_id = detail.get("reading_number"), detail.get("set_id")
        of = "" if number is None else f"the beam of reading {number} of set {set_id}: "
        return "the bench refused", f"{of}{detail.get('message')}"
    if kind == "delivery_short":
        return "delivery stopped short", (
            f"reading {detail.get('reading_id')}: {detail.get('actual_MU'):g} MU delivered of "
            f"{detail.get('planned_MU'):g} planned, its charge referred to the planned MU; "
            f"{_reason(detail.get('reason'))}"
        )
    if kind == "mu_per_reading_set":
        return "MU per reading set in the setup", (
            f"{detail.get('mu_per_reading'):g} MU (the plan's: {detail.get('plan_MU'):g} MU)"
        )
    if kind == EventKind.SESSION_REVIEWED:
        return review_event_words(event)
    if kind == "visit_beam":
        return "beam of a visit", (
            f"beam {detail.get('position')}, {detail.get('beam')}, "
            f"of visit {detail.get('visit_id')}"
        )
    return kind.replace("_", " "), _detail_text(detail)


def review_event_words(event: EventRow, reviewed: str = "session") -> tuple[str, str]:
    """Return (what, detail) of a review event of a session (or ``reviewed`` "visit"): the
    decision, who, their comment, and whether the reviewer was the person who measured (a
    self-review, allowed) or a second one."""
    review = review_of([event], EventKind(event.kind))
    assert review is not None
    who = reviewer_words(review) if review.self_review else f"{review.reviewer}, a second person"
    return f"{reviewed} {review.status}", f"by {who}; comment: {review.comment}"


def _detail_text(detail: dict[str, Any]) -> str:
    return ", ".join(
        f"{key.replace('_', ' ')}: {value}"
        for key, value in detail.items()
        if value not in (None, "")
    )
