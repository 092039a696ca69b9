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

    def to_dict(self) -> dict[str, Any]:
        """Return the review as JSON-ready data."""
        return {
            "status": self.status,
            "reviewer": self.reviewer,
            "comment": self.comment,
            "reviewed_at": self.reviewed_at,
            "account": self.account,
            "measured_by": self.measured_by,
        }


def review_of(events: tuple[EventRow, ...] | list[EventRow]) -> Review | None:
    """Return the review among a session's events (the first, the one that stands), or None."""
    for event in events:
        if event.kind == EventKind.SESSION_REVIEWED:
            detail = event.detail()
            return Review(
                status=str(detail.get("status")),
                reviewer=str(detail.get("reviewer")),
                comment=str(detail.get("comment", "")),
                reviewed_at=event.recorded_at,
                account=event.account,
                measured_by=detail.get("measured_by"),
            )
    return None


def review_status(review: Review | None) -> str:
    """Return ``unreviewed``, ``approved`` or ``rejected``."""
    return UNREVIEWED if review is None else review.status


def review_words(review: Review | None) -> str:
    """Return the review in words: "approved by reviewer B on 2026-12-03 07:10 UTC" or
    "unreviewed"."""
    if review is None:
        return UNREVIEWED
    stamp = review.reviewed_at[:16].replace("T", " ") + " UTC"
    return f"{review.status} by {review.reviewer} on {stamp}"


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
    if decision not in DECISIONS:
        raise InputError("decision", decision, "approve or reject", "is not known")
    reviewer = _text("reviewer", reviewer)
    comment = _text("comment", comment)
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
        if not allow_self_review:
            _refuse_self_review(reviewer, operator, _started_by_account(events))
        review = SessionReviewed(
            status=DECISIONS[decision],
            reviewer=reviewer,
            comment=comment,
            measured_by=operator,
            self_review_allowed=allow_self_review,
        )
        store.add_event(session_id, reviewer, EventKind.SESSION_REVIEWED, review)
        found = review_of(store.events(session_id))
    assert found is not None
    return found


def _text(field: str, value: object) -> str:
    if not isinstance(value, str) or not value.strip():
        raise InputError(field, value, "a non-empty text", "is empty")
    return " ".join(value.split()) if field == "reviewer" else value.strip()


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
