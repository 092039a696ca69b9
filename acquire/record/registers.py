"""The station's registers: machines and beams, chambers and their certificates, electrometers,
thermometers, barometers and k_Q, as append-only rows in the station file.

An *entry* (one chamber, one beam ...) is a sequence of rows: its first row (``entry_id`` = its
own id) and the rows that supersede it, each with the date from which it holds
(``effective_from``). Nothing is changed or deleted (triggers refuse it): an edit is a new row.
Each row is written after its ``register_row`` event, outside any session, whose detail holds
the row's whole content: the event is in the hash chain of the rows outside sessions, so an
edit shows, and :func:`register_row_problems` says which row no longer matches its event.

This module stores what it is given; the fields are checked by
:mod:`chargebook.acquire.session.register_rows` before they get here.

Reading works on any record (:class:`~chargebook.acquire.record.reader.RecordReader`): a station
file answers from its ``register_rows`` table; the department record, which holds no such table,
from the published ``register_row`` events outside sessions, each the whole content of its row
(the events a station file's rows are checked against), so `history --beam "DEMO-LA1 6 MV"`
finds the registers' beam there too.
"""

from __future__ import annotations

import json
from collections.abc import Iterable
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any

from chargebook.acquire.protocol import REGISTER_KINDS
from chargebook.acquire.record.events import EventKind, RegisterRowAdded
from chargebook.acquire.record.store import EventRow, NotFound, RegisterRowNotFound, Store
from chargebook.corrections.errors import InputError

if TYPE_CHECKING:
    from chargebook.acquire.record.reader import RecordReader

KINDS = REGISTER_KINDS

_COLUMNS = "id, kind, entry_id, supersedes, effective_from, fields_json, recorded_at, event_id"


@dataclass(frozen=True, slots=True)
class RegisterRow:
    """One register row: ``fields`` as checked when it was added; ``effective_from`` an ISO
    date; ``superseded_by`` the row that replaced it, if one did."""

    id: int
    kind: str
    entry_id: int
    supersedes: int | None
    effective_from: str
    fields: dict[str, Any]
    recorded_at: str
    event_id: int
    superseded_by: int | None = None

    @property
    def current(self) -> bool:
        """Return True when no row supersedes this one."""
        return self.superseded_by is None

    def to_dict(self) -> dict[str, Any]:
        """Return the row as JSON-ready data."""
        return {
            "id": self.id,
            "kind": self.kind,
            "entry_id": self.entry_id,
            "supersedes": self.supersedes,
            "superseded_by": self.superseded_by,
            "effective_from": self.effective_from,
            "recorded_at": self.recorded_at,
            "fields": dict(self.fields),
        }


def _fields_json(fields: dict[str, Any]) -> str:
    try:
        return json.dumps(fields, sort_keys=True, allow_nan=False, ensure_ascii=False)
    except (TypeError, ValueError) as error:
        allowed = "JSON values with finite numbers"
        raise InputError("fields", fields, allowed, f"cannot be stored ({error})") from None


def append_register_row(
    store: Store,
    kind: str,
    fields: dict[str, Any],
    *,
    actor: str,
    effective_from: str,
    supersedes: int | None = None,
    reason: str | None = None,
) -> RegisterRow:
    """Append one register row after its ``register_row`` event, in one transaction; return it.

    ``supersedes``: the current row of the entry this row replaces (refused if another row
    already replaced it). Raises ``InputError`` for an unknown kind, ``NotFound`` for a
    superseded row that does not exist.
    """
    if kind not in KINDS:
        raise InputError("kind", kind, ", ".join(KINDS), "is not a kind of register row")
    fields_json = _fields_json(fields)
    with store.atomic() as db:
        row_id = int(db.execute("SELECT coalesce(max(id), 0) + 1 FROM register_rows").fetchone()[0])
        entry_id = row_id
        if supersedes is not None:
            old = register_row(store, supersedes)
            if old.kind != kind:
                raise InputError("kind", kind, old.kind, f"differs from row {old.id}'s")
            if old.superseded_by is not None:
                raise InputError(
                    "row",
                    supersedes,
                    f"the entry's current row, {_current_of(store, old.entry_id).id}",
                    f"is already superseded by row {old.superseded_by}",
                )
            entry_id = old.entry_id
        detail: RegisterRowAdded = {
            "row": row_id,
            "kind": kind,
            "entry": entry_id,
            "supersedes": supersedes,
            "effective_from": effective_from,
            "fields": json.loads(fields_json),
            "reason": reason,
        }
        event_id = store.add_event(None, actor, EventKind.REGISTER_ROW, detail)
        (recorded_at,) = db.execute(
            "SELECT recorded_at FROM events WHERE id = ?", (event_id,)
        ).fetchone()
        db.execute(
            f"INSERT INTO register_rows ({_COLUMNS}) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
            (
                row_id,
                kind,
                entry_id,
                supersedes,
                effective_from,
                fields_json,
                recorded_at,
                event_id,
            ),
        )
    return register_row(store, row_id)


_SELECT = (
    f"SELECT {', '.join('r.' + c for c in _COLUMNS.split(', '))}, "
    "(SELECT n.id FROM register_rows n WHERE n.supersedes = r.id) FROM register_rows r"
)


def _row(values: tuple[Any, ...]) -> RegisterRow:
    row_id, kind, entry_id, supersedes, effective_from, fields_json, recorded_at, event_id, by = (
        values
    )
    return RegisterRow(
        id=int(row_id),
        kind=str(kind),
        entry_id=int(entry_id),
        supersedes=supersedes,
        effective_from=str(effective_from),
        fields=json.loads(fields_json),
        recorded_at=str(recorded_at),
        event_id=int(event_id),
        superseded_by=by,
    )


def rows_from_events(events: Iterable[EventRow]) -> list[RegisterRow]:
    """Return the register rows that ``register_row`` events record, oldest first, each
    marked with the row that superseded it (events of other kinds are ignored)."""
    rows: list[RegisterRow] = []
    for event in events:
        if event.kind != EventKind.REGISTER_ROW.value or event.session_id is not None:
            continue
        detail = event.detail()
        rows.append(
            RegisterRow(
                id=int(detail["row"]),
                kind=str(detail["kind"]),
                entry_id=int(detail["entry"]),
                supersedes=detail["supersedes"],
                effective_from=str(detail["effective_from"]),
                fields=dict(detail["fields"]),
                recorded_at=event.recorded_at,
                event_id=event.id,
            )
        )
    by = {row.supersedes: row.id for row in rows if row.supersedes is not None}
    marked = [replace(row, superseded_by=by.get(row.id)) for row in rows]
    return sorted(marked, key=lambda row: row.id)


def _every_row(
    store: RecordReader, where: str = "", params: tuple[Any, ...] = ()
) -> list[RegisterRow]:
    """Return the record's register rows (those ``where`` selects in a station file), by id."""
    if isinstance(store, Store):
        return [_row(values) for values in store.read(f"{_SELECT} {where} ORDER BY r.id", params)]
    return rows_from_events(store.events_of_kind(EventKind.REGISTER_ROW.value).get(None, []))


def register_row(store: RecordReader, row_id: int) -> RegisterRow:
    """Return register row ``row_id``; raise ``NotFound`` naming it when there is none."""
    found = [row for row in _every_row(store, "WHERE r.id = ?", (row_id,)) if row.id == row_id]
    if not found:
        where = store.path if isinstance(store, Store) else None
        raise RegisterRowNotFound(f"no register row with id {row_id} in {where or 'the database'}")
    return found[0]


def register_rows(
    store: RecordReader, kind: str | None = None, *, include_superseded: bool = False
) -> list[RegisterRow]:
    """Return the register rows of ``kind`` (None: every kind), oldest first: the current row
    of each entry, or every row with ``include_superseded``."""
    if kind is not None and kind not in KINDS:
        raise InputError("kind", kind, ", ".join(KINDS), "is not a kind of register row")
    return [
        row
        for row in _every_row(store)
        if (kind is None or row.kind == kind) and (include_superseded or row.current)
    ]


def entry_rows(store: RecordReader, entry_id: int) -> list[RegisterRow]:
    """Return every row of one entry, oldest first (the last is current)."""
    chosen = _every_row(store, "WHERE r.entry_id = ?", (entry_id,))
    return [row for row in chosen if row.entry_id == entry_id]


def _current_of(store: Store, entry_id: int) -> RegisterRow:
    return entry_rows(store, entry_id)[-1]


def register_row_problems(store: Store) -> list[tuple[int, str]]:
    """Return (row id, what is wrong) for each register row that does not match the
    ``register_row`` event written with it (the event is chained; the row is checked by it)."""
    if "register_rows" not in {row[0] for row in store.read("SELECT name FROM sqlite_master")}:
        return []
    events = {
        int(event_id): json.loads(detail)
        for event_id, detail in store.read(
            "SELECT id, detail_json FROM events WHERE kind = ? AND session_id IS NULL",
            (EventKind.REGISTER_ROW.value,),
        )
    }
    problems: list[tuple[int, str]] = []
    for row in register_rows(store, include_superseded=True):
        detail = events.get(row.event_id)
        if detail is None:
            problems.append((row.id, f"its register_row event {row.event_id} is missing"))
            continue
        recorded = {
            "row": row.id,
            "kind": row.kind,
            "entry": row.entry_id,
            "supersedes": row.supersedes,
            "effective_from": row.effective_from,
            "fields": row.fields,
        }
        changed = [key for key, value in recorded.items() if detail.get(key) != value]
        if changed:
            problems.append(
                (
                    row.id,
                    f"differs from its register_row event {row.event_id} in {', '.join(changed)}",
                )
            )
    return problems


__all__ = [
    "KINDS",
    "NotFound",
    "RegisterRow",
    "append_register_row",
    "entry_rows",
    "register_row",
    "register_row_problems",
    "register_rows",
    "rows_from_events",
]
