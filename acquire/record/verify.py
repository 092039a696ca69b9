"""Checking a stored record against its hash chain: which row of which table was changed.

:func:`verify_session` recomputes a session's chain (see :mod:`chargebook.acquire.record.chain`)
from the rows as they are now and reports every place where it does not hold: a row whose values no
longer match its hash (changed), a place with no row (deleted), two rows at one place or a row with
no place (inserted by another program), a chain that ends before the end the store recorded (the
last rows deleted). The session's own row and its reading sets are checked by their fixed facts
(metadata, plan, bias ...). It also checks that the status, reason and closing time of the session
and of each reading set are the ones their last status event in
the chain gave them (a status changed by a plain UPDATE, behind the store's back).

Read-only: nothing here writes.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

from chargebook.acquire.record import chain
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.migrations import session_uuid_at_migration
from chargebook.acquire.record.reader import RecordReader
from chargebook.acquire.record.registers import register_row_problems
from chargebook.acquire.record.store import SessionRow, SetRow, Store


@dataclass(frozen=True, slots=True)
class Problem:
    """One place where the record does not match its chain."""

    table: str
    row_id: int | None
    seq: int | None
    problem: str

    def words(self) -> str:
        """Return the problem in words, naming the table, the row and its place."""
        row = f"{self.table} row {self.row_id}" if self.row_id is not None else self.table
        place = f" (place {self.seq} in the chain)" if self.seq is not None else ""
        return f"{row}{place}: {self.problem}"


@dataclass(frozen=True, slots=True)
class ChainReport:
    """The result of checking one chain: a session's (``session_id``) or the rows outside any."""

    session_id: int | None
    rows: int
    head: str
    problems: tuple[Problem, ...]

    @property
    def verified(self) -> bool:
        """Return True when every row matches the chain and nothing is missing."""
        return not self.problems

    def to_dict(self) -> dict[str, Any]:
        """Return the report as JSON-ready data."""
        return {
            "session": self.session_id,
            "verified": self.verified,
            "rows": self.rows,
            "head": self.head,
            "problems": [
                {"table": p.table, "row_id": p.row_id, "seq": p.seq, "problem": p.problem}
                for p in self.problems
            ],
        }

    def summary(self) -> str:
        """Return one paragraph in words: verified with its head hash, or what does not match."""
        name = (
            "rows outside any session" if self.session_id is None else f"session {self.session_id}"
        )
        if self.verified:
            return f"{name}: verified, {self.rows} rows; chain head {self.head}"
        lines = [f"{name}: DOES NOT VERIFY ({len(self.problems)} problem(s) in {self.rows} rows)"]
        lines += [f"  {problem.words()}" for problem in self.problems]
        return "\n".join(lines)


def verify_session(store: RecordReader, session_id: int | None) -> ChainReport:
    """Return the check of the chain of session ``session_id`` (None: rows outside sessions).

    Raises ``NotFound`` for a session id that is not in the database.
    """
    if session_id is not None:
        store.session(session_id)
    rows, problems = _chained_rows(store, session_id)
    head, chain_problems = _check_links(rows)
    problems += chain_problems
    problems += _check_head(store, session_id, rows)
    if session_id is not None:
        events = [values for table, values, _seq, _hash in rows if table == "events"]
        problems += _check_statuses(store, session_id, events)
        problems += _check_uuid(store, session_id, events)
    elif isinstance(store, Store):  # a station file's registers and visits (not the department's)
        problems += [
            Problem("register_rows", row_id, None, words)
            for row_id, words in register_row_problems(store)
        ]
        events = [values for table, values, _seq, _hash in rows if table == "events"]
        problems += _check_visit_statuses(store, events)
    return ChainReport(session_id, len(rows), head, tuple(problems))


def file_damage(store: Store) -> list[str]:
    """Return what SQLite's quick integrity check finds wrong with the file (empty: intact)."""
    found = [str(row[0]) for row in store.read("PRAGMA quick_check(20)")]
    return [] if found == ["ok"] else found


def verify_all(store: Store) -> list[ChainReport]:
    """Return the check of every session's chain, oldest first, then of the rows outside."""
    reports = [verify_session(store, session.id) for session in store.sessions()]
    return [*reports, verify_session(store, None)]


Chained = tuple[str, tuple[Any, ...], int, str]


def _chained_rows(
    store: RecordReader, session_id: int | None
) -> tuple[list[Chained], list[Problem]]:
    """Return the chain's rows (table, values, seq, hash) in chain order, and the rows that have
    no place in it."""
    rows: list[Chained] = []
    problems: list[Problem] = []
    for table in _tables_of(store, session_id):
        for *values, seq, digest in store.chained_rows(table, session_id):
            if seq is None or digest is None:
                problems.append(
                    Problem(
                        table,
                        values[0],
                        None,
                        "has no place in the chain: it was written by another program",
                    )
                )
                continue
            rows.append((table, tuple(values), int(seq), str(digest)))
    rows.sort(key=lambda row: row[2])
    return rows, problems


def _tables_of(store: RecordReader, session_id: int | None) -> tuple[str, ...]:
    """Return the tables whose rows a chain holds: the visit tables are in a station file's
    chain of the rows outside any session (the department does not hold visits yet)."""
    if session_id is None and isinstance(store, Store):
        return (*chain.CHAINED_TABLES, *chain.VISIT_COLUMNS)
    return chain.CHAINED_TABLES


def _check_links(rows: list[Chained]) -> tuple[str, list[Problem]]:
    """Return the chain's head and the rows whose hash does not hold, in chain order."""
    problems: list[Problem] = []
    previous, expected = chain.GENESIS, 1
    for table, values, seq, digest in rows:
        assert seq is not None and digest is not None
        if seq < expected:
            problems.append(
                Problem(
                    table,
                    values[0],
                    seq,
                    f"a second row at place {seq}: one of the two was inserted by another program",
                )
            )
            continue
        if seq > expected:
            missing = f"place {expected}" if seq == expected + 1 else f"places {expected}-{seq - 1}"
            problem = f"the row(s) at {missing} before it are missing: deleted (its own values "
            problems.append(Problem(table, values[0], seq, problem + "cannot be checked)"))
        elif chain.plain_link(previous, seq, table, values) != digest and (
            chain.link(previous, seq, table, values) != digest
        ):
            problems.append(
                Problem(
                    table,
                    values[0],
                    seq,
                    "changed after it was written: its values no longer match its hash",
                )
            )
        previous, expected = digest, seq + 1
    return previous, problems


def _check_head(store: RecordReader, session_id: int | None, rows: list[Chained]) -> list[Problem]:
    """Return a problem when the chain ends before the end the store recorded."""
    found = store.chain_head(session_id)
    last_seq, last_hash = (rows[-1][2], rows[-1][3]) if rows else (0, chain.GENESIS)
    if found is None:
        if rows:
            return [Problem("chain_heads", None, None, "the chain's recorded end is missing")]
        return []
    seq, digest = int(found[0]), str(found[1])
    if seq > (last_seq or 0):
        return [
            Problem(
                "chain_heads",
                None,
                seq,
                f"the chain was recorded up to place {seq} "
                f"but ends at place {last_seq}: the last rows were deleted",
            )
        ]
    if seq == last_seq and digest != last_hash:
        return [Problem("chain_heads", None, seq, "the chain's last row is not the one recorded")]
    return []


def _check_statuses(
    store: RecordReader, session_id: int, events: list[tuple[Any, ...]]
) -> list[Problem]:
    """Return the session and sets whose status, reason or end time is not the one their last
    status event in the chain gave them."""
    kind_at = chain.COLUMNS["events"].index("kind")
    detail_at = chain.COLUMNS["events"].index("detail_json")
    session_status: dict[str, Any] = {"to": "open", "reason": None, "closed_at": None}
    set_status: dict[int, dict[str, Any]] = {}
    for values in events:
        if values[kind_at] not in (EventKind.SESSION_STATUS, EventKind.SET_STATUS):
            continue
        try:
            detail = json.loads(values[detail_at])
        except ValueError:
            continue  # a changed event: the link check has named it
        if values[kind_at] == EventKind.SESSION_STATUS:
            session_status = detail
        elif isinstance(detail.get("set_id"), int):
            set_status[detail["set_id"]] = detail
    session = store.session(session_id)
    checks: list[tuple[str, int, dict[str, Any], SessionRow | SetRow, str]] = [
        ("sessions", session.id, session_status, session, "closed_at"),
        *(
            ("reading_sets", row.id, set_status.get(row.id, _NEVER_CHANGED), row, "ended_at")
            for row in store.sets(session_id)
        ),
    ]
    problems: list[Problem] = []
    for table, row_id, recorded, row, end_key in checks:
        now = (row.status, row.reason, getattr(row, end_key))
        problems += _status_differs(table, row_id, recorded, now, end_key)
    return problems


def _check_visit_statuses(store: Store, events: list[tuple[Any, ...]]) -> list[Problem]:
    """Return the visits whose status, reason or closing time is not the one their last
    ``visit_status`` event in the chain gave them."""
    kind_at = chain.COLUMNS["events"].index("kind")
    detail_at = chain.COLUMNS["events"].index("detail_json")
    recorded: dict[int, dict[str, Any]] = {}
    for values in events:
        if values[kind_at] != "visit_status":
            continue
        try:
            detail = json.loads(values[detail_at])
        except ValueError:
            continue  # a changed event: the link check has named it
        recorded[detail.get("visit_id")] = detail
    problems: list[Problem] = []
    for row_id, status, reason, closed_at in store.read(
        "SELECT id, status, reason, closed_at FROM visits ORDER BY id"
    ):
        expected = recorded.get(row_id, {"to": "open", "reason": None, "closed_at": None})
        now = (status, reason, closed_at)
        problems += _status_differs("visits", row_id, expected, now, "closed_at")
    return problems


def _check_uuid(
    store: RecordReader, session_id: int, events: list[tuple[Any, ...]]
) -> list[Problem]:
    """Return a problem when the session's UUID is not the one its chain recorded: the one in
    its ``session_created`` event, or (a session recorded before sessions had UUIDs) the one
    the migration derives from the station's UUID and the session id."""
    kind_at = chain.COLUMNS["events"].index("kind")
    detail_at = chain.COLUMNS["events"].index("detail_json")
    recorded: Any = None
    for values in events:
        if values[kind_at] == EventKind.SESSION_CREATED:
            try:
                recorded = json.loads(values[detail_at]).get("uuid")
            except ValueError:
                return []  # a changed event: the link check has named it
            break
    if recorded is None:
        recorded = session_uuid_at_migration(store.station().uuid, session_id)
    found = store.session(session_id).uuid
    if found == recorded:
        return []
    problem = f"uuid is {found!r}, the chain recorded {recorded!r}: changed after it was written"
    return [Problem("sessions", session_id, None, problem)]


#: What a set's status, reason and end time are before its first status event.
_NEVER_CHANGED = {"to": "collecting", "reason": None, "ended_at": None}


def _status_differs(
    table: str, row_id: int, recorded: dict[str, Any], now: tuple[Any, Any, Any], end_key: str
) -> list[Problem]:
    names = ("status", "reason", end_key)
    expected = (recorded.get("to"), recorded.get("reason"), recorded.get(end_key, now[2]))
    changed = [
        f"{name} is {value!r}, its last status event says {want!r}"
        for name, value, want in zip(names, now, expected, strict=True)
        if value != want
    ]
    if not changed:
        return []
    return [Problem(table, row_id, None, "changed without a status event: " + "; ".join(changed))]
