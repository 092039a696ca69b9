"""Calibration visits in the record: one sitting at one treatment machine, several beams.

A visit (table ``visits``) holds the machine and the visit's metadata (operator, the age past
which carried air data must be read again, register row ids when the station has registers);
its beams (``visit_beams``), in the order the physicist added them, each with its plan's name
and its session metadata; and the link of each session that measured a beam
(``visit_sessions``; a beam whose session was aborted may be measured again in a new session).
The beam tables are append-only; a visit changes only its status, open then closed, and each
change is a ``visit_status`` event written first. A beam skipped or left unfinished is a
``visit_beam_status`` event with its reason. Every row and event of a visit is chained with the
rows outside any session (chain 0), and the session measuring a beam carries a ``visit_beam``
event in its own chain naming the visit and the beam.

A beam's status is read, never stored: ``planned`` (nothing yet), ``measuring`` (its session
is open or interrupted), ``measured`` (its session finished), ``unfinished`` (its session was
aborted, or it was left with a reason) or ``skipped`` (with a reason): whichever came last in
the chain decides.
"""

from __future__ import annotations

import json
import uuid
from dataclasses import dataclass
from typing import Any

from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.migrations import VISIT_FINAL_STATUSES
from chargebook.acquire.record.store import (
    DAEMON_ACTOR,
    EventRow,
    NotFound,
    SessionRow,
    Store,
    VisitNotFound,
    json_object,
)
from chargebook.corrections.errors import InputError

VISIT_CREATED = EventKind.VISIT_CREATED
VISIT_STATUS = EventKind.VISIT_STATUS
BEAM_ADDED = EventKind.VISIT_BEAM_ADDED
BEAM_STARTED = EventKind.VISIT_BEAM_STARTED
BEAM_STATUS = EventKind.VISIT_BEAM_STATUS
#: The event in a beam's session naming its visit and beam.
SESSION_BEAM = EventKind.VISIT_BEAM
#: What an operator may set a beam to by hand (a measured beam is its session's doing).
BEAM_MARKS = ("skipped", "unfinished")
#: Beam statuses, as :func:`beam_states` reads them.
BEAM_STATUSES = ("planned", "measuring", "measured", "unfinished", "skipped")
#: A beam in one of these may be measured (again, in a new session).
STARTABLE = ("planned", "unfinished", "skipped")


@dataclass(frozen=True, slots=True)
class VisitRow:
    """One calibration visit: its machine, its metadata (``metadata()``) and its status."""

    id: int
    uuid: str
    created_at: str
    machine: str
    metadata_json: str
    status: str
    closed_at: str | None
    reason: str | None

    def metadata(self) -> dict[str, Any]:
        return json_object(self.metadata_json)


@dataclass(frozen=True, slots=True)
class VisitBeamRow:
    """One beam of a visit: its place, name, plan name and session metadata."""

    id: int
    visit_id: int
    position: int
    name: str
    plan: str
    metadata_json: str
    register_ids_json: str  # register name -> row id in the station registers ({} until then)
    recorded_at: str

    def metadata(self) -> dict[str, Any]:
        return json_object(self.metadata_json)

    def register_ids(self) -> dict[str, int]:
        return {str(k): int(v) for k, v in json_object(self.register_ids_json).items()}


@dataclass(frozen=True, slots=True)
class BeamState:
    """A beam as it stands: its status, why (skipped or unfinished), and its latest session."""

    beam: VisitBeamRow
    status: str
    reason: str | None
    session_id: int | None
    sessions: tuple[int, ...]  # every session that measured it, oldest first


def _text(field: str, value: object) -> str:
    if not isinstance(value, str) or not value.strip():
        raise InputError(field, value, "a non-empty text", "is empty")
    return " ".join(value.split())


def same_name(a: str, b: str) -> bool:
    """Return True when two beam names are the same but for case and repeated spaces."""
    return " ".join(a.split()).casefold() == " ".join(b.split()).casefold()


# ------------------------------------------------------------------------------ reading


def visits(store: Store) -> list[VisitRow]:
    """Return every visit, oldest first."""
    return [VisitRow(*row) for row in store.read(f"SELECT {_VISIT} FROM visits ORDER BY id")]


def visit(store: Store, visit_id: int) -> VisitRow:
    """Return one visit. Raises :class:`NotFound` when there is none."""
    rows = store.read(f"SELECT {_VISIT} FROM visits WHERE id = ?", (visit_id,))
    if not rows:
        raise VisitNotFound(f"no visit with id {visit_id} in {store.path or 'the database'}")
    return VisitRow(*rows[0])


def open_visit(store: Store) -> VisitRow | None:
    """Return the newest open visit (the one a restarted daemon takes up again), or None."""
    rows = store.read(f"SELECT {_VISIT} FROM visits WHERE status = 'open' ORDER BY id DESC")
    return VisitRow(*rows[0]) if rows else None


def beams(store: Store, visit_id: int) -> list[VisitBeamRow]:
    """Return the visit's beams in the order they were added."""
    sql = f"SELECT {_BEAM} FROM visit_beams WHERE visit_id = ? ORDER BY position"
    return [VisitBeamRow(*row) for row in store.read(sql, (visit_id,))]


def visit_events(store: Store, visit_id: int) -> list[EventRow]:
    """Return the visit's own events (outside any session), oldest first."""
    return [
        event
        for event in store.events(None)
        if event.kind.startswith("visit_") and event.detail().get("visit_id") == visit_id
    ]


def visit_of_session(store: Store, session_id: int) -> tuple[int, int] | None:
    """Return (visit id, beam id) of the visit a session measured a beam of, or None."""
    rows = store.read(
        "SELECT visit_id, beam_id FROM visit_sessions WHERE session_id = ?", (session_id,)
    )
    return (int(rows[0][0]), int(rows[0][1])) if rows else None


def visit_session_ids(store: Store, visit_id: int) -> list[int]:
    """Return the ids of the sessions that measured the visit's beams, in the order they were
    started. Raises :class:`NotFound` when there is no such visit."""
    visit(store, visit_id)
    rows = store.read(
        "SELECT session_id FROM visit_sessions WHERE visit_id = ? ORDER BY id", (visit_id,)
    )
    return [int(session_id) for (session_id,) in rows]


def beam_states(store: Store, visit_id: int) -> list[BeamState]:
    """Return each beam of the visit with its status, in the visit's order (see the module)."""
    happened: dict[int, list[tuple[int, str, Any]]] = {}
    for beam_id, session_id, seq in store.read(
        "SELECT beam_id, session_id, chain_seq FROM visit_sessions WHERE visit_id = ?",
        (visit_id,),
    ):
        happened.setdefault(int(beam_id), []).append((int(seq), "session", int(session_id)))
    for seq, detail_json in store.read(
        "SELECT chain_seq, detail_json FROM events WHERE session_id IS NULL AND kind = ? "
        "AND json_extract(detail_json, '$.visit_id') = ?",
        (BEAM_STATUS, visit_id),
    ):
        detail = json.loads(detail_json)
        happened.setdefault(int(detail["beam_id"]), []).append(
            (int(seq), str(detail["to"]), detail.get("reason"))
        )
    states = []
    for beam in beams(store, visit_id):
        events = sorted(happened.get(beam.id, []))
        sessions = tuple(value for _seq, kind, value in events if kind == "session")
        latest = sessions[-1] if sessions else None
        if not events:
            status, reason = "planned", None
        elif events[-1][1] == "session":
            status, reason = _session_status(store.session(events[-1][2]))
        else:
            status, reason = events[-1][1], events[-1][2]
        states.append(BeamState(beam, status, reason, latest, sessions))
    return states


#: The reason the engine gives a session that ran its whole plan (nothing to say on a beam).
PLAN_COMPLETE = "plan complete"


def _session_status(session: SessionRow) -> tuple[str, str | None]:
    if session.status == "finished":
        return "measured", None if session.reason == PLAN_COMPLETE else session.reason
    if session.status == "aborted":
        return "unfinished", session.reason
    return "measuring", None


# ------------------------------------------------------------------------------ writing


def create_visit(
    store: Store, machine: str, metadata: dict[str, Any], actor: str = DAEMON_ACTOR
) -> int:
    """Record a new open visit at ``machine`` and its ``visit_created`` event; return its id.

    Refused (InputError naming ``visit``) while another visit is open: one sitting at a
    time per station.
    """
    machine = _text("machine", machine)
    with store.atomic():
        already = open_visit(store)
        if already is not None:
            raise InputError(
                "visit",
                already.id,
                "no visit open: one sitting at a time per station",
                f"at {already.machine} is still open: close it first",
            )
        visit_uuid = str(uuid.uuid4())
        row = {
            "uuid": visit_uuid,
            "created_at": store.stamp(),
            "machine": machine,
            "metadata_json": json.dumps(metadata, sort_keys=True, allow_nan=False),
            "status": "open",
        }
        visit_id = store.append_visit_row("visits", row)
        store.add_event(
            None,
            actor,
            VISIT_CREATED,
            {"visit_id": visit_id, "uuid": visit_uuid, "machine": machine, "metadata": metadata},
        )
    return visit_id


def add_beam(
    store: Store,
    visit_id: int,
    name: str,
    plan: str,
    metadata: dict[str, Any],
    actor: str = DAEMON_ACTOR,
    register_ids: dict[str, int] | None = None,
) -> int:
    """Append a beam to an open visit, after the ones already there; return its id.
    ``register_ids``: the beam's rows in the station registers (machine and beam, chamber,
    electrometer), by register name, once the station has registers.

    Refused by name (InputError on ``beam``) when the visit already has a beam of that name
    (case and repeated spaces aside): two beams of one name could not be told apart.
    """
    name = _text("beam", name)
    plan = _text("plan", plan)
    with store.atomic():
        current = _require_open(store, visit_id)
        known = beams(store, visit_id)
        for beam in known:
            if same_name(beam.name, name):
                raise InputError(
                    "beam",
                    name,
                    "a beam name not yet in this visit",
                    f"is already beam {beam.position} of visit {current.id}",
                )
        position = len(known) + 1
        row = {
            "visit_id": visit_id,
            "position": position,
            "name": name,
            "plan": plan,
            "metadata_json": json.dumps(metadata, sort_keys=True, allow_nan=False),
            "register_ids_json": json.dumps(register_ids or {}, sort_keys=True),
            "recorded_at": store.stamp(),
        }
        beam_id = store.append_visit_row("visit_beams", row)
        store.add_event(
            None,
            actor,
            BEAM_ADDED,
            {
                "visit_id": visit_id,
                "beam_id": beam_id,
                "position": position,
                "name": name,
                "plan": plan,
            },
        )
    return beam_id


def link_session(
    store: Store, visit_id: int, beam_id: int, session_id: int, actor: str = DAEMON_ACTOR
) -> None:
    """Record that ``session_id`` measures beam ``beam_id`` of the open visit: the link row,
    an event outside sessions and a ``visit_beam`` event in the session's own chain."""
    with store.atomic():
        current = _require_open(store, visit_id)
        beam = _beam(store, visit_id, beam_id)
        store.append_visit_row(
            "visit_sessions",
            {
                "visit_id": visit_id,
                "beam_id": beam_id,
                "session_id": session_id,
                "recorded_at": store.stamp(),
            },
        )
        detail = {
            "visit_id": visit_id,
            "beam_id": beam_id,
            "beam": beam.name,
            "session_id": session_id,
        }
        store.add_event(None, actor, BEAM_STARTED, detail)
        store.add_event(
            session_id,
            actor,
            SESSION_BEAM,
            {**detail, "visit_uuid": current.uuid, "position": beam.position},
        )


def mark_beam(
    store: Store,
    visit_id: int,
    beam_id: int,
    status: str,
    reason: str,
    actor: str = DAEMON_ACTOR,
) -> None:
    """Record a beam of the open visit as skipped or unfinished, with the reason.

    Refused by name while the beam's session is open (stop or abort the session first) and
    for a beam already measured.
    """
    if status not in BEAM_MARKS:
        raise InputError("status", status, " or ".join(BEAM_MARKS), "is not known")
    reason = _text("reason", reason)
    with store.atomic():
        _require_open(store, visit_id)
        state = _state(store, visit_id, beam_id)
        if state.status in ("measuring", "measured"):
            raise InputError(
                "beam",
                state.beam.name,
                "a beam not measured and not being measured",
                f"is {state.status} (session {state.session_id})",
            )
        store.add_event(
            None,
            actor,
            BEAM_STATUS,
            {
                "visit_id": visit_id,
                "beam_id": beam_id,
                "beam": state.beam.name,
                "to": status,
                "reason": reason,
            },
        )


def close_visit(
    store: Store, visit_id: int, reason: str | None = None, actor: str = DAEMON_ACTOR
) -> None:
    """Close the visit for good. Refused while a beam is being measured; each beam still
    planned is recorded as unfinished, with the closing reason (which it then needs)."""
    with store.atomic():
        current = _require_open(store, visit_id)
        states = beam_states(store, visit_id)
        measuring = [state.beam.name for state in states if state.status == "measuring"]
        if measuring:
            raise InputError(
                "visit",
                visit_id,
                "a visit whose beams are all closed",
                f"has beam {measuring[0]} still being measured: finish, stop or abort it first",
            )
        planned = [state for state in states if state.status == "planned"]
        if planned and not (reason and reason.strip()):
            raise InputError(
                "reason",
                reason,
                "why the visit ends before every beam was measured",
                f"is needed: beam {planned[0].beam.name} was not measured",
            )
        for state in planned:
            mark_beam(
                store,
                visit_id,
                state.beam.id,
                "unfinished",
                f"the visit was closed: {reason}",
                actor,
            )
        closed_at = store.stamp()
        store.add_event(
            None,
            actor,
            VISIT_STATUS,
            {
                "visit_id": visit_id,
                "from": current.status,
                "to": "closed",
                "reason": reason,
                "closed_at": closed_at,
            },
        )
        store.db.execute(
            "UPDATE visits SET status = ?, reason = ?, closed_at = ? WHERE id = ?",
            ("closed", reason, closed_at, visit_id),
        )


def _require_open(store: Store, visit_id: int) -> VisitRow:
    try:
        found = visit(store, visit_id)
    except NotFound:
        raise InputError(
            "visit", visit_id, "a visit recorded at this station", "is not recorded"
        ) from None
    if found.status in VISIT_FINAL_STATUSES:
        raise InputError("visit", visit_id, "an open visit", f"is {found.status}")
    return found


def _beam(store: Store, visit_id: int, beam_id: int) -> VisitBeamRow:
    for beam in beams(store, visit_id):
        if beam.id == beam_id:
            return beam
    raise InputError("beam", beam_id, f"a beam of visit {visit_id}", "is not one of its beams")


def _state(store: Store, visit_id: int, beam_id: int) -> BeamState:
    _beam(store, visit_id, beam_id)
    return next(state for state in beam_states(store, visit_id) if state.beam.id == beam_id)


_VISIT = "id, uuid, created_at, machine, metadata_json, status, closed_at, reason"
_BEAM = "id, visit_id, position, name, plan, metadata_json, register_ids_json, recorded_at"
