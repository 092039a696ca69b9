"""Review and sign-off of a closed session by a second person: approved or rejected, with why.

A review is one ``session_reviewed`` event in the session's audit (and so in its hash chain):
the decision, the reviewer's name, the comment, the operator who measured, and, from the
event row itself, when and from which Unix account. A session is reviewed once: a decision
stands, and a rejected session stays in the record (``history`` leaves it out by default).

Refused, by name, before anything is written: a session still open or interrupted (nothing to
sign yet); an aborted session approved (it can only be rejected); a second review; and, unless
self-review is allowed, a reviewer who is the operator who measured (the session's ``operator``
metadata, compared without regard to case or repeated spaces) or the Unix account that started
the session.
"""

from __future__ import annotations

import getpass
from dataclasses import dataclass
from typing import Any

from chargebook.acquire.record.events import EventKind, SessionReviewed
from chargebook.acquire.record.store import EventRow, NotFound, Store
from chargebook.corrections.errors import InputError

#: The review of a whole calibration visit: an event outside sessions naming the visit.
VISIT_REVIEW_EVENT = EventKind.VISIT_REVIEWED
#: What the command line and the protocol ask for -> what the record says.
DECISIONS = {"approve": "approved", "reject": "rejected"}
#: A session's review status as shown by ``sessions``, ``show`` and the reports.
UNREVIEWED = "unreviewed"
#: Session statuses a review may be given to.
REVIEWABLE_STATUSES = ("finished", "aborted")


@dataclass(frozen=True, slots=True)
class Review:
    """One recorded review: ``status`` approved or rejected, by whom, when (UTC ISO), why."""

    status: str
    reviewer: str
    comment: str
    reviewed_at: str
    account: str | None
    measured_by: str | None
    #: The reviewer measured (or started) what they reviewed, as --allow-self-review let them.
    self_review: bool = False

    def to_dict(self) -> dict[str, Any]:
        """Return the review as JSON-ready data."""
        return {
            "status": self.status,
            "reviewer": self.reviewer,
            "comment": self.comment,
            "reviewed_at": self.reviewed_at,
            "account": self.account,
            "measured_by": self.measured_by,
            "self_review": self.self_review,
        }


def review_of(
    events: tuple[EventRow, ...] | list[EventRow], kind: EventKind = EventKind.SESSION_REVIEWED
) -> Review | None:
    """Return the review among a session's events (the first, the one that stands), or None;
    ``kind`` :data:`VISIT_REVIEW_EVENT` among a visit's events."""
    for event in events:
        if event.kind == kind:
            detail = event.detail()
            reviewer = str(detail.get("reviewer"))
            # Reviews recorded before "self_review" was kept: the operator reviewing, allowed.
            allowed_self = bool(detail.get("self_review_allowed")) and _same_person(
                reviewer, detail.get("measured_by")
            )
            return Review(
                status=str(detail.get("status")),
                reviewer=reviewer,
                comment=str(detail.get("comment", "")),
                reviewed_at=event.recorded_at,
                account=event.account,
                measured_by=detail.get("measured_by"),
                self_review=bool(detail.get("self_review", allowed_self)),
            )
    return None


def review_status(review: Review | None) -> str:
    """Return ``unreviewed``, ``approved`` or ``rejected``."""
    return UNREVIEWED if review is None else review.status


def review_words(review: Review | None) -> str:
    """Return the review in words: "approved by reviewer B on 2026-12-03 07:10 UTC" (with
    :data:`SELF_REVIEW_WORDS` after the name for a self-review) or "unreviewed"."""
    if review is None:
        return UNREVIEWED
    stamp = review.reviewed_at[:16].replace("T", " ") + " UTC"
    return f"{review.status} by {reviewer_words(review)} on {stamp}"


#: What a review by the person who measured says beside the reviewer's name.
SELF_REVIEW_WORDS = "(self-review, allowed by --allow-self-review)"


def reviewer_words(review: Review) -> str:
    """Return the reviewer's name, marked "(self-review, ...)" when they reviewed their own."""
    return f"{review.reviewer} {SELF_REVIEW_WORDS}" if review.self_review else review.reviewer


def local_account() -> str | None:
    """Return the Unix account this process runs as (recorded beside a direct review)."""
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return None


def _same_person(a: object, b: object) -> bool:
    if not isinstance(a, str) or not isinstance(b, str):
        return False
    return " ".join(a.split()).casefold() == " ".join(b.split()).casefold()


def _started_by_account(events: list[EventRow]) -> str | None:
    """Return the Unix account that started the session, if recorded."""
    for event in events:
        if event.kind == EventKind.SESSION_CREATED:
            return event.account
    return None


def record_review(
    store: Store,
    session_id: int,
    decision: str,
    reviewer: str,
    comment: str,
    *,
    allow_self_review: bool = False,
) -> Review:
    """Record the review of a closed session and return it; refuse by name what is not allowed.

    ``decision`` is ``approve`` or ``reject``. Raises ``NotFound`` for a missing session and
    :class:`InputError` (naming ``session``, ``decision``, ``reviewer`` or ``comment``) for a
    review that may not be given; nothing is written then. Call inside
    ``store.on_behalf_of(account)`` to record the reviewer's Unix account.
    """
    reviewer, comment = _checked(decision, reviewer, comment)
    with store.atomic():
        try:
            session = store.session(session_id)
        except NotFound:
            raise InputError(
                "session", session_id, "a session recorded at this station", "is not recorded"
            ) from None
        if session.status not in REVIEWABLE_STATUSES:
            raise InputError(
                "session",
                session_id,
                "a finished or aborted session",
                f"is {session.status}: a session is reviewed once it is closed",
            )
        if session.replay_of is not None:
            raise InputError(
                "session",
                session_id,
                "a measured session",
                f"is a replay of session {session.replay_of}, not a measurement: review the "
                "original",
            )
        if decision == "approve" and session.status == "aborted":
            raise InputError(
                "decision",
                decision,
                "reject (an aborted session can only be rejected)",
                f"cannot approve session {session_id}: it was aborted",
            )
        events = store.events(session_id)
        earlier = review_of(events)
        if earlier is not None:
            raise InputError(
                "session",
                session_id,
                "a session not yet reviewed",
                f"is already {review_words(earlier)}",
            )
        operator = session.metadata().get("operator")
        started_by = _started_by_account(events)
        if not allow_self_review:
            _refuse_self_review(reviewer, operator, started_by)
        review = SessionReviewed(
            status=DECISIONS[decision],
            reviewer=reviewer,
            comment=comment,
            measured_by=operator,
            self_review_allowed=allow_self_review,
            self_review=_is_self_review(reviewer, [operator, started_by]),
        )
        store.add_event(session_id, reviewer, EventKind.SESSION_REVIEWED, review)
        found = review_of(store.events(session_id))
    assert found is not None
    return found


def record_visit_review(
    store: Store,
    visit_id: int,
    decision: str,
    reviewer: str,
    comment: str,
    *,
    allow_self_review: bool = False,
) -> Review:
    """Record the review of a closed calibration visit and return it; refuse by name what is
    not allowed, as :func:`record_review` does for a session.

    Refused: a visit still open; an approval of a visit none of whose beams was measured; a
    second review; and, unless self-review is allowed, a reviewer who is the visit's operator or
    the operator of any beam's session. The sessions keep their own reviews.
    """
    from chargebook.acquire.record import visits

    reviewer, comment = _checked(decision, reviewer, comment)
    with store.atomic():
        try:
            visit = visits.visit(store, visit_id)
        except NotFound:
            raise InputError(
                "visit", visit_id, "a visit recorded at this station", "is not recorded"
            ) from None
        if visit.status != "closed":
            raise InputError(
                "visit",
                visit_id,
                "a closed visit",
                f"is {visit.status}: a visit is reviewed once it is closed",
            )
        states = visits.beam_states(store, visit_id)
        if decision == "approve" and not any(state.status == "measured" for state in states):
            raise InputError(
                "decision",
                decision,
                "reject (a visit with no beam measured can only be rejected)",
                f"cannot approve visit {visit_id}: none of its beams was measured",
            )
        events = visits.visit_events(store, visit_id)
        earlier = review_of(events, VISIT_REVIEW_EVENT)
        if earlier is not None:
            raise InputError(
                "visit", visit_id, "a visit not yet reviewed", f"is already {review_words(earlier)}"
            )
        operator = visit.metadata().get("operator")
        created = next((e for e in events if e.kind == EventKind.VISIT_CREATED), None)
        started_by = created.account if created else None
        beam_operators = [
            store.session(session_id).metadata().get("operator")
            for session_id in sorted({s for state in states for s in state.sessions})
        ]
        if not allow_self_review:
            _refuse_self_review(reviewer, operator, started_by)
            for measured_by in beam_operators:
                _refuse_self_review(reviewer, measured_by, None)
        store.add_event(
            None,
            reviewer,
            VISIT_REVIEW_EVENT,
            {
                "visit_id": visit_id,
                "status": DECISIONS[decision],
                "reviewer": reviewer,
                "comment": comment,
                "measured_by": operator,
                "self_review_allowed": allow_self_review,
                "self_review": _is_self_review(reviewer, [operator, started_by, *beam_operators]),
            },
        )
        found = review_of(visits.visit_events(store, visit_id), VISIT_REVIEW_EVENT)
    assert found is not None
    return found


def _checked(decision: str, reviewer: str, comment: str) -> tuple[str, str]:
    """Return the reviewer's name and comment, tidied; InputError for an unknown decision or
    an empty name or comment."""
    if decision not in DECISIONS:
        raise InputError("decision", decision, "approve or reject", "is not known")
    return _text("reviewer", reviewer), _text("comment", comment)


def _text(field: str, value: object) -> str:
    if not isinstance(value, str) or not value.strip():
        raise InputError(field, value, "a non-empty text", "is empty")
    return " ".join(value.split()) if field == "reviewer" else value.strip()


def _is_self_review(reviewer: str, people: list[object]) -> bool:
    """Return True when ``reviewer`` is one of the people who measured or started the work."""
    return any(_same_person(reviewer, person) for person in people)


def _refuse_self_review(reviewer: str, operator: object, started_by: str | None) -> None:
    """Raise InputError when ``reviewer`` is the operator who measured or the account that
    started the session."""
    if _same_person(reviewer, operator):
        raise InputError(
            "reviewer",
            reviewer,
            f"a second person, not the operator who measured ({operator})",
            "measured this session: a review needs a second person",
        )
    if _same_person(reviewer, started_by):
        raise InputError(
            "reviewer",
            reviewer,
            f"a second person, not the Unix account that started the session ({started_by})",
            "started this session: a review needs a second person",
        )
