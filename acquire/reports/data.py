"""Everything the read-side commands show about a session, loaded from the store once.

A :class:`SessionRecord` holds the stored raw values (session row, plan, reading sets with their
readings, environment entries, events) and the results, which are always recomputed from those
raw values by :func:`chargebook.acquire.session.evaluation.evaluate_session`, the one evaluation
the daemon's live results also use (with the session's own thresholds, the environment entry in
force for each set and the metadata), so a report says what the console said.

Nothing here writes to the store.
"""

from __future__ import annotations

import contextlib
import dataclasses
import functools
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.reader import RecordReader
from chargebook.acquire.record.review import Review, review_of
from chargebook.acquire.record.store import (
    EnvironmentRow,
    EventRow,
    ReadingRow,
    SessionRow,
    SetRow,
    StationRow,
)
from chargebook.acquire.record.verify import ChainReport, verify_session
from chargebook.acquire.session.evaluation import SessionContext, evaluate_session, stored_context
from chargebook.acquire.session.plan import Plan
from chargebook.corrections.errors import InputError
from chargebook.corrections.evaluate import Evaluation

#: Set statuses that end a set without it counting: the audit lists each with its reason.
UNUSED_SET_STATUSES = ("superseded", "aborted", "interrupted")
#: Event kinds the audit of a session lists (besides set and session status changes).
AUDIT_EVENT_KINDS = (
    EventKind.MANUAL_STEP_DONE,
    EventKind.BIAS_CHANGED,
    EventKind.STEP_SKIPPED,
    EventKind.READING_DROPPED,
    EventKind.INSTRUMENT_LOST,
    EventKind.INSTRUMENT_BACK,
    EventKind.BENCH_REFUSED,
    EventKind.SESSION_RESUMED,
    EventKind.DAEMON_STOPPED,
    EventKind.DAEMON_RESTARTED,
    EventKind.UNRECORDED_LINES_RECOVERED,
    EventKind.NOTE,
    EventKind.LEAKAGE_SUBTRACTION_CHOSEN,
    EventKind.DELIVERY_SHORT,
    EventKind.MU_PER_READING_SET,
    EventKind.VISIT_BEAM,
    EventKind.SESSION_REVIEWED,
)


@dataclass(frozen=True)
class SetRecord:
    """One stored reading set and its readings, in the order taken."""

    row: SetRow
    readings: tuple[ReadingRow, ...]

    @property
    def used(self) -> tuple[ReadingRow, ...]:
        """Return the readings that count (settling readings are kept but not used)."""
        return tuple(r for r in self.readings if not r.settling)


@dataclass(frozen=True)
class SessionRecord:
    """One session as stored, with its results recomputed from the raw values."""

    session: SessionRow
    plan: Plan | None
    sets: tuple[SetRecord, ...]
    environment: tuple[EnvironmentRow, ...]
    events: tuple[EventRow, ...]
    traffic_lines: int
    evaluation: Evaluation | None
    results_error: str | None
    instrument: dict[str, Any] | None = None
    integrity: ChainReport | None = None  # the check of the session's hash chain
    station: StationRow | None = None  # the station that keeps the record

    @functools.cached_property
    def set_rows(self) -> dict[int, SetRow]:
        """Return the session's set rows by id (made once: the audit looks up each event's)."""
        return {s.row.id: s.row for s in self.sets}

    @property
    def review(self) -> Review | None:
        """Return the session's review (approved or rejected), or None while unreviewed."""
        return review_of(self.events)

    def integrity_warning(self) -> str | None:
        """Return, when the record does not verify, the warning to put at the top; else None."""
        if self.integrity is None or self.integrity.verified:
            return None
        return (
            f"WARNING: THIS RECORD DOES NOT VERIFY. It was changed after it was written; the "
            f"values below may not be the ones measured (`chargebook verify {self.session.id}`).\n"
            + self.integrity.summary()
        )

    @property
    def metadata(self) -> dict[str, Any]:
        """Return the metadata as stored."""
        return self.session.metadata()

    @property
    def manual_readings(self) -> tuple[tuple[SetRow, ReadingRow], ...]:
        """Return the readings captured by hand, with their sets."""
        return tuple((s.row, r) for s in self.sets for r in s.readings if r.capture == "manual")

    def audit(self) -> list[EventRow]:
        """Return the events worth auditing: redos, aborts, manual steps, status changes."""
        return [event for event in self.events if _worth_auditing(event)]


def _worth_auditing(event: EventRow) -> bool:
    if event.kind == EventKind.SET_STATUS:
        return event.detail().get("to") in UNUSED_SET_STATUSES
    if event.kind == EventKind.BIAS_CHANGED:
        return event.detail().get("how") != "remote"  # a change by hand is a manual step
    return event.kind in AUDIT_EVENT_KINDS or event.kind == EventKind.SESSION_STATUS


def instrument_identity(
    store: RecordReader, session: SessionRow, events: tuple[EventRow, ...]
) -> dict[str, Any] | None:
    """Return the instrument identity the daemon recorded for the session, or None.

    The latest ``instrument_identified`` event of the session; else, since the daemon often
    identifies the instrument before a session opens, the latest one recorded outside any
    session before the session closed.
    """
    identified = EventKind.INSTRUMENT_IDENTIFIED
    found = [e for e in events if e.kind == identified]
    if not found:
        end = session.closed_at or "9999"
        found = [e for e in store.events(None) if e.kind == identified and e.recorded_at <= end]
    return found[-1].detail() if found else None


def load_record(store: RecordReader, session_id: int, *, check_chain: bool = True) -> SessionRecord:
    """Return the session's stored record with results recomputed; NotFound if it is missing.

    ``integrity`` is the check of the session's hash chain (``verify``), unless ``check_chain``
    is False (``history``, which loads every session of a beam: `chargebook verify` checks all).

    A session whose stored metadata or readings cannot be evaluated still loads: its
    ``evaluation`` is None and ``results_error`` says why, in the words of the InputError.
    """
    session = store.session(session_id)
    by_set = store.readings_by_set(session_id)
    sets = tuple(SetRecord(row, by_set.get(row.id, ())) for row in store.sets(session_id))
    environment = tuple(store.environment(session_id))
    events = tuple(store.events(session_id))
    context: SessionContext | None = None
    with contextlib.suppress(InputError):  # evaluate_session says why, in its own words
        context = stored_context(store, session_id, events)
    found = evaluate_session(store, session_id, context)
    return SessionRecord(
        session=session,
        plan=None if context is None else context.plan,
        sets=sets,
        environment=environment,
        events=events,
        traffic_lines=store.traffic_count(session_id),
        evaluation=found.evaluation,
        results_error=found.error,
        instrument=instrument_identity(store, session, events),
        integrity=verify_session(store, session_id) if check_chain else None,
        station=store.station(),
    )


def plain(value: Any) -> Any:
    """Return ``value`` with dataclasses, tuples and mappings turned into JSON-ready types."""
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {f.name: plain(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, Mapping):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [plain(v) for v in value]
    if isinstance(value, bytes):
        return value.decode("utf-8", errors="backslashreplace")
    return value
