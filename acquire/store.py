"""The station's durable record: one SQLite file, written only by the daemon.

Everything a session produced is kept here: the session and its plan and metadata, reading sets,
readings, environment entries, the audit log of events (who did what, when, and why) and the raw
instrument traffic. Readings, environment entries, events and traffic are append-only: triggers
refuse UPDATE and DELETE. Sessions and reading sets may change their status (each change is also
written as an event, in the same transaction) but never their recorded facts.

Durability: the file is in WAL mode with ``synchronous=FULL``, and every public write method
commits before it returns. A reading the daemon announces to a client is therefore on disk, and a
power cut cannot take it back. FULL costs one fsync per commit (about 0.2 ms on the development
machine's SSD, a few ms on a slow disk); readings arrive a few per minute, and raw lines, which
may stream by the thousand per second, are committed a burst at a time (``add_traffic_many``),
so the cost is affordable and NORMAL's risk of losing the last commits on power loss is not
worth taking for a measurement record.

Threads: the daemon calls the store from its event loop and from the driver's worker thread (raw
traffic), so one connection is shared under a lock.

Times: ``recorded_at`` columns are UTC ISO 8601 with microseconds, from the injected ``now``
clock; ``t_s`` columns are seconds on the driver's monotonic clock, as the driver reported them.
"""

from __future__ import annotations

import functools
import json
import math
import os
import sqlite3
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, fields
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, TypeVar

from chargebook.acquire.migrations import (
    CAPTURE_MODES,
    SCHEMA_VERSION,
    SESSION_FINAL_STATUSES,
    SESSION_STATUSES,
    SET_FINAL_STATUSES,
    SET_PURPOSES,
    SET_STATUSES,
    TRAFFIC_DIRECTIONS,
    SchemaTooNew,
    migrate,
    schema_version,
)
from chargebook.corrections.errors import InputError
from sqlite_utils import Database

__all__ = [
    "CAPTURE_MODES",
    "SESSION_STATUSES",
    "SET_PURPOSES",
    "SET_STATUSES",
    "TRAFFIC_DIRECTIONS",
    "EnvironmentRow",
    "EventRow",
    "NotFound",
    "ReadingRow",
    "SchemaTooNew",
    "SessionRow",
    "SetRow",
    "Store",
    "StoreError",
    "TrafficRow",
    "default_db_path",
]

#: Who the store names as the actor of the events it writes itself, unless told otherwise.
DAEMON_ACTOR = "daemon"
#: How long a reader or the writer waits for the other's lock before giving up, in ms.
BUSY_TIMEOUT_MS = 5000


class StoreError(Exception):
    """The station database cannot do what was asked (missing file, final status, ...)."""


class NotFound(StoreError, KeyError):
    """A session or reading set with the given id is not in the database."""

    def __str__(self) -> str:
        return str(self.args[0]) if self.args else "not found"


def default_db_path() -> Path:
    """Return the station database path: ``$XDG_DATA_HOME/chargebook/station.sqlite``.

    Falls back to ``~/.local/share/chargebook/station.sqlite`` when XDG_DATA_HOME is unset or
    not absolute (as the XDG base directory specification says).
    """
    data_home = os.environ.get("XDG_DATA_HOME", "")
    base = Path(data_home) if os.path.isabs(data_home) else Path.home() / ".local" / "share"
    return base / "chargebook" / "station.sqlite"


def utc_now() -> datetime:
    """Return the current time, timezone-aware UTC."""
    return datetime.now(UTC)


def utc_stamp_now() -> str:
    """Return the time now as ``recorded_at`` is written: UTC, ISO 8601, to the microsecond.

    The same text as ``utc_now().isoformat(timespec="microseconds")``, in less than half the
    time: every raw line is stamped, and lines may arrive by the ten thousand a second.
    """
    second, micro = divmod(time.time_ns() // 1000, 1_000_000)
    return f"{_utc_second(second)}.{micro:06d}+00:00"


@functools.lru_cache(maxsize=2)
def _utc_second(second: int) -> str:
    """Return the date and time of a whole second since the epoch, UTC, without the offset."""
    return datetime.fromtimestamp(second, UTC).isoformat(timespec="seconds").removesuffix("+00:00")


# --------------------------------------------------------------------------------------- rows


@dataclass(frozen=True, slots=True)
class SessionRow:
    """One measurement session. ``metadata()`` and ``plan()`` decode the stored JSON."""

    id: int
    created_at: str
    status: str
    metadata_json: str
    plan_json: str
    convention: str
    beam: str
    replay_of: int | None
    closed_at: str | None
    reason: str | None

    def metadata(self) -> dict[str, Any]:
        return json.loads(self.metadata_json)

    def plan(self) -> dict[str, Any]:
        return json.loads(self.plan_json)


@dataclass(frozen=True, slots=True)
class SetRow:
    """One reading set: one attempt at one plan step. ``bias_V`` is signed."""

    id: int
    session_id: int
    step_index: int
    step_key: str
    purpose: str
    polarity: int
    bias_V: float
    attempt: int
    status: str
    reason: str | None
    started_at: str
    ended_at: str | None


@dataclass(frozen=True, slots=True)
class ReadingRow:
    """One charge reading in nC, signed as the instrument reported it."""

    id: int
    session_id: int
    set_id: int
    seq: int
    t_s: float
    charge_nC: float
    capture: str
    settling: bool
    status: str
    traffic_id: int | None
    recorded_at: str


@dataclass(frozen=True, slots=True)
class EnvironmentRow:
    """One environment entry: temperature in °C, pressure in kPa (and as entered), RH in %."""

    id: int
    session_id: int
    recorded_at: str
    temperature_C: float
    pressure_kPa: float
    pressure_entered: float
    pressure_unit: str
    humidity_pct: float | None
    source: str


@dataclass(frozen=True, slots=True)
class EventRow:
    """One audit event: who (``actor``) did what (``kind``), when, and ``detail()`` (why)."""

    id: int
    session_id: int | None
    recorded_at: str
    actor: str
    kind: str
    detail_json: str

    def detail(self) -> dict[str, Any]:
        return json.loads(self.detail_json)


@dataclass(frozen=True, slots=True)
class TrafficRow:
    """One raw line sent to (``tx``) or received from (``rx``) the instrument."""

    id: int
    session_id: int | None
    t_s: float
    recorded_at: str
    direction: str
    line: bytes


Row = TypeVar("Row", SessionRow, SetRow, ReadingRow, EnvironmentRow, EventRow, TrafficRow)
#: One raw line to record, in the traffic table's column order:
#: (session_id, t_s, recorded_at, direction, line bytes).
TrafficLine = tuple[int | None, float, str, str, bytes]


# --------------------------------------------------------------------------------- validation


def _require_choice(field: str, value: object, allowed: tuple[Any, ...]) -> None:
    if value not in allowed or isinstance(value, bool):
        raise InputError(field, value, ", ".join(str(a) for a in allowed), "is not known")


def _require_text(field: str, value: object) -> str:
    if not isinstance(value, str) or not value.strip():
        raise InputError(field, value, "a non-empty text", "is empty or not text")
    return value


def _require_int(field: str, value: object, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise InputError(field, value, f"a whole number ≥ {minimum}", "is not a whole number")
    if value < minimum:
        raise InputError(field, value, f"a whole number ≥ {minimum}")
    return value


def _require_finite(field: str, value: object, *, optional: bool = False) -> float | None:
    if value is None and optional:
        return None
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        allowed = "a finite number" + (" or None" if optional else "")
        raise InputError(field, value, allowed, "is not a finite number")
    return float(value)


def _to_json(field: str, value: object) -> str:
    allowed = "a dict of JSON values with finite numbers"
    if not isinstance(value, dict):
        raise InputError(field, value, allowed, "is not a dict")
    try:
        return json.dumps(value, sort_keys=True, allow_nan=False, ensure_ascii=False)
    except (TypeError, ValueError) as error:
        raise InputError(field, value, allowed, f"cannot be stored as JSON ({error})") from None


# -------------------------------------------------------------------------------------- store


class Store:
    """The station database. Every public write method commits before it returns."""

    def __init__(
        self, db: Database, path: Path | None, now: Callable[[], datetime] = utc_now
    ) -> None:
        """Wrap an open, migrated database. Use :meth:`open` or :meth:`memory` instead."""
        self.db = db
        self.path = path
        self._now = now
        self._lock = threading.RLock()

    # ------------------------------------------------------------------ opening and closing

    @classmethod
    def open(
        cls,
        path: str | Path,
        *,
        read_only: bool = False,
        now: Callable[[], datetime] = utc_now,
    ) -> Store:
        """Open the station database at ``path``: create it and migrate it unless ``read_only``.

        A writable open switches the file to WAL mode. A read-only open (the read-side commands,
        while a daemon may be writing) never creates or migrates: it requires an existing file
        at the current schema version. Raises :class:`StoreError` naming the path when the file
        is missing, not a database, or at another schema version.
        """
        path = Path(path).expanduser()
        if read_only and not path.is_file():
            raise StoreError(f"no station database at {path} (pass --db FILE to choose one)")
        if not read_only:
            path.parent.mkdir(parents=True, exist_ok=True)
        target = f"{path.resolve().as_uri()}?mode=ro" if read_only else str(path)
        conn = sqlite3.connect(target, uri=read_only, check_same_thread=False)
        try:
            store = cls._prepare(conn, path, read_only=read_only, now=now)
        except sqlite3.DatabaseError as error:
            conn.close()
            raise StoreError(f"{path} is not a usable chargebook database: {error}") from None
        except (SchemaTooNew, StoreError) as error:
            conn.close()
            raise StoreError(f"{path}: {error}") from None
        return store

    @classmethod
    def memory(cls, *, now: Callable[[], datetime] = utc_now) -> Store:
        """Return a migrated in-memory store (for unit tests: nothing reaches a disk)."""
        conn = sqlite3.connect(":memory:", check_same_thread=False)
        return cls._prepare(conn, None, read_only=False, now=now)

    @classmethod
    def _prepare(
        cls,
        conn: sqlite3.Connection,
        path: Path | None,
        *,
        read_only: bool,
        now: Callable[[], datetime],
    ) -> Store:
        db = Database(conn)
        db.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
        db.execute("PRAGMA foreign_keys = ON")
        if read_only:
            version = schema_version(db)
            if version > SCHEMA_VERSION:
                raise StoreError(
                    f"schema version {version} was written by a newer chargebook; this one reads "
                    f"version {SCHEMA_VERSION}: install the newer chargebook to read it"
                )
            if version != SCHEMA_VERSION:
                raise StoreError(
                    f"schema version {version}, this chargebook reads version {SCHEMA_VERSION}; "
                    "start the daemon on it once to migrate it"
                )
        else:
            if path is not None:
                db.enable_wal()
            db.execute("PRAGMA synchronous = FULL")
            migrate(db)
        return cls(db, path, now)

    def close(self) -> None:
        """Close the database connection (everything written is already committed)."""
        with self._lock:
            self.db.close()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    @property
    def schema_version(self) -> int:
        """Return the schema version of the open database."""
        with self._lock:
            return schema_version(self.db)

    # ---------------------------------------------------------------------------- helpers

    @contextmanager
    def atomic(self) -> Iterator[Database]:
        """Hold the lock and run the block in one transaction, committed on exit.

        The outermost block begins IMMEDIATE: it takes the write lock first, so a concurrent
        writer (a replay, a reviewer's tool) makes it wait up to the busy timeout instead of
        failing at once, as a deferred transaction that read before writing did. A nested
        block is a savepoint: an error rolls back that block's rows only.
        """
        with self._lock:
            conn = self.db.conn
            if conn.in_transaction:
                with self.db.atomic():  # a savepoint inside the open transaction
                    yield self.db
                return
            conn.execute("BEGIN IMMEDIATE")
            try:
                yield self.db
            except BaseException:
                conn.rollback()
                raise
            try:
                conn.execute("COMMIT")
            except BaseException:
                conn.rollback()
                raise

    def _stamp(self) -> str:
        if self._now is utc_now:
            return utc_stamp_now()
        return self._now().astimezone(UTC).isoformat(timespec="microseconds")

    def _insert(self, table: str, row: dict[str, Any]) -> int:
        columns = ", ".join(row)
        marks = ", ".join("?" for _ in row)
        cursor = self.db.execute(
            f"INSERT INTO {table} ({columns}) VALUES ({marks})", tuple(row.values())
        )
        return int(cursor.lastrowid)

    def _select(self, cls: type[Row], table: str, where: str, params: tuple = ()) -> list[Row]:
        return [cls(*row) for row in self._rows(cls, table, where, params)]

    def _rows(self, cls: type, table: str, where: str, params: tuple = ()) -> list[tuple]:
        """Return the raw rows of ``table`` with the columns of ``cls``, ordered by id."""
        sql = f"SELECT {_column_list(cls)} FROM {table} WHERE {where} ORDER BY id"
        with self._lock:
            return self.db.execute(sql, params).fetchall()

    def _one(self, cls: type[Row], table: str, row_id: int, what: str) -> Row:
        found = self._select(cls, table, "id = ?", (row_id,))
        if not found:
            raise NotFound(f"no {what} with id {row_id} in {self.path or 'the database'}")
        return found[0]

    def _event(self, session_id: int | None, actor: str, kind: str, detail: dict) -> int:
        return self._insert(
            "events",
            {
                "session_id": session_id,
                "recorded_at": self._stamp(),
                "actor": _require_text("actor", actor),
                "kind": _require_text("kind", kind),
                "detail_json": _to_json("detail", detail),
            },
        )

    # ------------------------------------------------------------------------- sessions

    def create_session(
        self,
        metadata: dict,
        plan: dict,
        convention: str,
        beam: str,
        replay_of: int | None = None,
        actor: str = DAEMON_ACTOR,
    ) -> int:
        """Record a new open session and its ``session_created`` event; return its id."""
        row = {
            "created_at": self._stamp(),
            "status": "open",
            "metadata_json": _to_json("metadata", metadata),
            "plan_json": _to_json("plan", plan),
            "convention": _require_text("convention", convention),
            "beam": _require_text("beam", beam),
            "replay_of": replay_of,
        }
        with self.atomic():
            if replay_of is not None:
                self._one(SessionRow, "sessions", replay_of, "session")
            session_id = self._insert("sessions", row)
            self._event(
                session_id,
                actor,
                "session_created",
                {"convention": convention, "beam": beam, "replay_of": replay_of},
            )
        return session_id

    def open_session(self) -> SessionRow | None:
        """Return the newest session whose status is open (the one to resume), or None."""
        rows = self._select(SessionRow, "sessions", "status = 'open'")
        return rows[-1] if rows else None

    def set_session_status(
        self, session_id: int, status: str, reason: str | None = None, actor: str = DAEMON_ACTOR
    ) -> None:
        """Change a session's status and record the change as a ``session_status`` event.

        Leaving open sets ``closed_at``; returning to open (resuming an interrupted session)
        clears it. A finished or aborted session is final: changing it raises StoreError.
        """
        _require_choice("status", status, SESSION_STATUSES)
        with self.atomic():
            old = self._one(SessionRow, "sessions", session_id, "session")
            if old.status in SESSION_FINAL_STATUSES and status != old.status:
                raise StoreError(
                    f"session {session_id} is {old.status}; its status can no longer change"
                )
            closed_at = None if status == "open" else (old.closed_at or self._stamp())
            self.db.execute(
                "UPDATE sessions SET status = ?, reason = ?, closed_at = ? WHERE id = ?",
                (status, reason, closed_at, session_id),
            )
            self._event(
                session_id,
                actor,
                "session_status",
                {"from": old.status, "to": status, "reason": reason},
            )

    def sessions(self) -> list[SessionRow]:
        """Return every session, oldest first."""
        return self._select(SessionRow, "sessions", "1")

    def session(self, session_id: int) -> SessionRow:
        """Return one session. Raises :class:`NotFound` (a KeyError) when there is none."""
        return self._one(SessionRow, "sessions", session_id, "session")

    # ---------------------------------------------------------------------- reading sets

    def add_set(
        self,
        session_id: int,
        step_index: int,
        step_key: str,
        purpose: str,
        polarity: int,
        bias_V: float,
        attempt: int,
    ) -> int:
        """Record a new reading set, status collecting; return its id. ``bias_V`` is signed."""
        _require_choice("purpose", purpose, SET_PURPOSES)
        _require_choice("polarity", polarity, (1, -1))
        bias_V = _require_finite("bias_V", bias_V)
        if bias_V != 0 and math.copysign(1, bias_V) != polarity:
            raise InputError(
                "bias_V", bias_V, f"a bias of sign {polarity:+d}", "contradicts the polarity"
            )
        row = {
            "session_id": session_id,
            "step_index": _require_int("step_index", step_index, 0),
            "step_key": _require_text("step_key", step_key),
            "purpose": purpose,
            "polarity": polarity,
            "bias_V": bias_V,
            "attempt": _require_int("attempt", attempt, 1),
            "status": "collecting",
            "started_at": self._stamp(),
        }
        with self.atomic():
            self._one(SessionRow, "sessions", session_id, "session")
            return self._insert("reading_sets", row)

    def set_set_status(
        self, set_id: int, status: str, reason: str | None = None, actor: str = DAEMON_ACTOR
    ) -> None:
        """Change a reading set's status and record the change as a ``set_status`` event.

        Leaving collecting/reviewing sets ``ended_at`` once; going back to collecting clears it.
        A superseded or aborted set is final: changing it raises StoreError.
        """
        _require_choice("status", status, SET_STATUSES)
        with self.atomic():
            old = self._one(SetRow, "reading_sets", set_id, "reading set")
            if old.status in SET_FINAL_STATUSES and status != old.status:
                raise StoreError(
                    f"reading set {set_id} is {old.status}; its status can no longer change"
                )
            if status == "collecting":
                ended_at = None
            elif status == "reviewing":
                ended_at = old.ended_at
            else:
                ended_at = old.ended_at or self._stamp()
            self.db.execute(
                "UPDATE reading_sets SET status = ?, reason = ?, ended_at = ? WHERE id = ?",
                (status, reason, ended_at, set_id),
            )
            self._event(
                old.session_id,
                actor,
                "set_status",
                {
                    "set_id": set_id,
                    "step_key": old.step_key,
                    "attempt": old.attempt,
                    "from": old.status,
                    "to": status,
                    "reason": reason,
                },
            )

    def sets(self, session_id: int) -> list[SetRow]:
        """Return the session's reading sets, oldest first (superseded attempts included)."""
        return self._select(SetRow, "reading_sets", "session_id = ?", (session_id,))

    def reading_set(self, set_id: int) -> SetRow:
        """Return one reading set. Raises :class:`NotFound` (a KeyError) when there is none."""
        return self._one(SetRow, "reading_sets", set_id, "reading set")

    # --------------------------------------------------------------------------- readings

    def add_reading(
        self,
        session_id: int,
        set_id: int,
        seq: int,
        t_s: float,
        charge_nC: float,
        capture: str,
        settling: bool,
        status: str,
        traffic_id: int | None = None,
    ) -> int:
        """Record one charge reading (nC, signed) and commit it; return its id."""
        _require_choice("capture", capture, CAPTURE_MODES)
        if not isinstance(settling, bool | int) or settling not in (0, 1):
            raise InputError("settling", settling, "True or False", "is not a yes/no value")
        row = {
            "session_id": session_id,
            "set_id": set_id,
            "seq": _require_int("seq", seq, 0),
            "t_s": _require_finite("t_s", t_s),
            "charge_nC": _require_finite("charge_nC", charge_nC),
            "capture": capture,
            "settling": int(settling),
            "status": _require_text("status", status),
            "traffic_id": traffic_id,
            "recorded_at": self._stamp(),
        }
        with self.atomic():
            reading_set = self._one(SetRow, "reading_sets", set_id, "reading set")
            if reading_set.session_id != session_id:
                raise InputError(
                    "set_id",
                    set_id,
                    f"a reading set of session {session_id}",
                    f"belongs to session {reading_set.session_id}",
                )
            return self._insert("readings", row)

    def readings(self, session_id: int, set_id: int | None = None) -> list[ReadingRow]:
        """Return the session's readings (of one set if ``set_id`` is given), oldest first."""
        if set_id is None:
            rows = self._rows(ReadingRow, "readings", "session_id = ?", (session_id,))
        else:
            rows = self._rows(
                ReadingRow, "readings", "session_id = ? AND set_id = ?", (session_id, set_id)
            )
        return [_reading_row(row) for row in rows]

    # ------------------------------------------------------------------------ environment

    def add_environment(
        self,
        session_id: int,
        temperature_C: float,
        pressure_kPa: float,
        pressure_entered: float,
        pressure_unit: str,
        humidity_pct: float | None,
        source: str,
    ) -> int:
        """Record one environment entry (°C, kPa and the pressure as entered, % RH); its id.

        Ranges are the physics library's business; the store refuses only what is not a
        finite number.
        """
        row = {
            "session_id": session_id,
            "recorded_at": self._stamp(),
            "temperature_C": _require_finite("temperature_C", temperature_C),
            "pressure_kPa": _require_finite("pressure_kPa", pressure_kPa),
            "pressure_entered": _require_finite("pressure_entered", pressure_entered),
            "pressure_unit": _require_text("pressure_unit", pressure_unit),
            "humidity_pct": _require_finite("humidity_pct", humidity_pct, optional=True),
            "source": _require_text("source", source),
        }
        with self.atomic():
            self._one(SessionRow, "sessions", session_id, "session")
            return self._insert("environment", row)

    def environment(self, session_id: int) -> list[EnvironmentRow]:
        """Return the session's environment entries, oldest first (the last one is current)."""
        return self._select(EnvironmentRow, "environment", "session_id = ?", (session_id,))

    # ----------------------------------------------------------------------------- events

    def add_event(self, session_id: int | None, actor: str, kind: str, detail: dict) -> int:
        """Record one audit event (who, what, and why in ``detail``); return its id."""
        with self.atomic():
            if session_id is not None:
                self._one(SessionRow, "sessions", session_id, "session")
            return self._event(session_id, actor, kind, detail)

    def events(self, session_id: int | None) -> list[EventRow]:
        """Return the session's events, oldest first (``None``: events outside any session)."""
        if session_id is None:
            return self._select(EventRow, "events", "session_id IS NULL")
        return self._select(EventRow, "events", "session_id = ?", (session_id,))

    def events_after(self, session_id: int, event_id: int) -> list[EventRow]:
        """Return the session's events newer than ``event_id``, oldest first."""
        return self._select(EventRow, "events", "session_id = ? AND id > ?", (session_id, event_id))

    # ---------------------------------------------------------------------------- traffic

    def add_traffic(self, session_id: int | None, t_s: float, direction: str, line: bytes) -> int:
        """Record one raw instrument line exactly as sent or received; return its id."""
        row = dict(
            zip(
                _TRAFFIC_COLUMNS,
                _traffic_row((session_id, t_s, self._stamp(), direction, line)),
                strict=True,
            )
        )
        with self.atomic():
            if session_id is not None:
                self._one(SessionRow, "sessions", session_id, "session")
            return self._insert("traffic", row)

    def stamp(self) -> str:
        """Return the time now as the store writes it in ``recorded_at`` (UTC ISO 8601)."""
        return self._stamp()

    def add_traffic_many(self, lines: Sequence[TrafficLine]) -> int:
        """Record raw instrument lines in one commit; return how many were recorded.

        Each line is (session_id, t_s, recorded_at, direction, line bytes), ``recorded_at``
        taken with :meth:`stamp` when the line was sent or received, so that the record keeps
        the order of lines and events even though the lines are written a burst at a time (one
        commit, one fsync, is what lets the daemon keep up with an instrument that streams
        thousands of lines a second). Every line is checked before anything is written: one
        bad line refuses the whole call.
        """
        rows = [_traffic_row(line) for line in lines]
        with self.atomic() as db:
            for session_id in {row[0] for row in rows} - {None}:
                self._one(SessionRow, "sessions", session_id, "session")
            db.conn.executemany(_INSERT_TRAFFIC, rows)
        return len(rows)

    def traffic_count(self, session_id: int | None) -> int:
        """Return how many raw lines were recorded for the session (``None``: outside any)."""
        where = "session_id IS NULL" if session_id is None else "session_id = ?"
        params = () if session_id is None else (session_id,)
        with self._lock:
            return int(
                self.db.execute(f"SELECT count(*) FROM traffic WHERE {where}", params).fetchone()[0]
            )

    def newest_traffic_id(self) -> int:
        """Return the id of the newest raw line recorded (0 when there is none)."""
        with self._lock:
            return int(self.db.execute("SELECT coalesce(max(id), 0) FROM traffic").fetchone()[0])

    def traffic(self, session_id: int | None) -> list[TrafficRow]:
        """Return the session's raw traffic in the order recorded (``None``: outside sessions)."""
        if session_id is None:
            return self._select(TrafficRow, "traffic", "session_id IS NULL")
        return self._select(TrafficRow, "traffic", "session_id = ?", (session_id,))


_TRAFFIC_COLUMNS = ("session_id", "t_s", "recorded_at", "direction", "line")
_INSERT_TRAFFIC = f"INSERT INTO traffic ({', '.join(_TRAFFIC_COLUMNS)}) VALUES (?, ?, ?, ?, ?)"


def _traffic_row(line: TrafficLine) -> TrafficLine:
    """Return one raw line, checked, as a row in the order of _TRAFFIC_COLUMNS."""
    session_id, t_s, recorded_at, direction, data = line
    if (
        type(t_s) is float
        and math.isfinite(t_s)
        and type(data) is bytes
        and direction in TRAFFIC_DIRECTIONS
        and type(recorded_at) is str
        and recorded_at
    ):
        return line  # the common case, checked at the speed lines arrive
    _require_choice("direction", direction, TRAFFIC_DIRECTIONS)
    if not isinstance(data, bytes | bytearray | memoryview):
        raise InputError("line", data, "the raw bytes of the line", "is not bytes")
    _require_text("recorded_at", recorded_at)
    return (session_id, _require_finite("t_s", t_s), recorded_at, direction, bytes(data))


@functools.cache
def _column_list(cls: type) -> str:
    """Return the columns of a row dataclass, in field order, for a SELECT."""
    return ", ".join(field.name for field in fields(cls))


_SETTLING = [field.name for field in fields(ReadingRow)].index("settling")


def _reading_row(row: tuple) -> ReadingRow:
    """Return a ReadingRow from its raw columns, ``settling`` as a bool (stored 0 or 1)."""
    return ReadingRow(*row[:_SETTLING], bool(row[_SETTLING]), *row[_SETTLING + 1 :])
