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
import shutil
import sqlite3
import tempfile
import threading
import time
import uuid
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field, fields, replace
from datetime import UTC, datetime
from itertools import chain as chain_iterables
from itertools import repeat
from operator import itemgetter
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

from chargebook.acquire.record import chain, events
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.migrations import (
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
    restore_session_results,
    schema_version,
    session_results_shape,
)
from chargebook.corrections.errors import InputError

if TYPE_CHECKING:
    from chargebook.acquire.record.reader import RecordReader
    from sqlite_utils import Database

__all__ = [
    "CAPTURE_MODES",
    "SESSION_STATUSES",
    "SET_PURPOSES",
    "SET_STATUSES",
    "TRAFFIC_DIRECTIONS",
    "EnvironmentRow",
    "EventRow",
    "InputRow",
    "NotFound",
    "ReadingRow",
    "SchemaTooNew",
    "SessionRow",
    "SetRow",
    "StationRow",
    "Store",
    "StoreError",
    "TrafficRow",
    "default_db_path",
]

#: Who the store names as the actor of the events it writes itself, unless told otherwise.
DAEMON_ACTOR = "daemon"
#: How long a reader or the writer waits for the other's lock before giving up, in ms.
BUSY_TIMEOUT_MS = 5000


def group_by_set(readings: Iterable[ReadingRow]) -> dict[int, tuple[ReadingRow, ...]]:
    """Return ``readings`` grouped by set id, in the order given within each set."""
    grouped: dict[int, list[ReadingRow]] = {}
    for reading in readings:
        grouped.setdefault(reading.set_id, []).append(reading)
    return {set_id: tuple(rows) for set_id, rows in grouped.items()}


def group_by_session(events: Iterable[EventRow]) -> dict[int | None, list[EventRow]]:
    """Return ``events`` grouped by session id (None: outside any session), in order."""
    found: dict[int | None, list[EventRow]] = {}
    for event in events:
        found.setdefault(event.session_id, []).append(event)
    return found


#: The range of SQLite's INTEGER: a whole number outside it cannot be bound to a query.
_SQLITE_INT_MIN, _SQLITE_INT_MAX = -(2**63), 2**63 - 1


def _text_names(text: str | None) -> tuple[str, ...] | None:
    """Return the names in a JSON array of them (``session_names``), or None unless every one
    is text."""
    values = None if text is None else json.loads(text)
    if not isinstance(values, list) or not all(isinstance(v, str) for v in values):
        return None
    return tuple(values)


def _storable(params: Sequence[Any]) -> bool:
    """Return False when a whole number among ``params`` is outside SQLite's INTEGER range
    (a mistyped id: SQLite would raise OverflowError; no row can hold it)."""
    return all(
        not isinstance(value, int) or _SQLITE_INT_MIN <= value <= _SQLITE_INT_MAX
        for value in params
    )


#: What a damaged file raises when its pages are first read, after it opened; the commands catch
#: it to say so in words, without importing sqlite3 themselves.
UnreadableRecord = sqlite3.DatabaseError


#: The metadata keys :meth:`Store.session_names` reads: what a listing of sessions shows and
#: filters on.
NAMED_KEYS = ("treatment_machine", "beam", "operator")
#: One look into a session's metadata for all of :data:`NAMED_KEYS` (an array of their values):
#: a name missing or null reads as null there, and is told apart by a second look.
_NAMES_EXTRACTED = "json_extract(metadata_json, {})".format(
    ", ".join(f"'$.{key}'" for key in NAMED_KEYS)
)
#: A condition that ``column`` is one of the ids of a JSON array given as one parameter.
_IN_JSON_IDS = "{} IN (SELECT value FROM json_each(?))"
#: How much of a station file a read-only open maps into memory (SQLite maps no more than the
#: file holds): 1 GiB, far beyond decades of daily checks.
READ_MMAP_BYTES = 1 << 30


class StoreError(Exception):
    """The station database cannot do what was asked (missing file, final status, ...)."""


class NotFound(StoreError, KeyError):
    """A session or reading set with the given id is not in the database."""

    #: The command that lists what may be asked for, named beside the error (None: none does).
    listed_by: str | None = "chargebook sessions"

    def __str__(self) -> str:
        return str(self.args[0]) if self.args else "not found"


class RegisterRowNotFound(NotFound):
    """A register row with the given id is not in the station's registers."""

    listed_by: str | None = "chargebook register list"


class VisitNotFound(NotFound):
    """A calibration visit with the given id is not in the database."""

    listed_by: str | None = None


def default_db_path() -> Path:
    """Return the station database path: ``$XDG_DATA_HOME/chargebook/station.sqlite``.

    Falls back to ``~/.local/share/chargebook/station.sqlite`` when XDG_DATA_HOME is unset or
    not absolute (as the XDG base directory specification says).
    """
    data_home = os.environ.get("XDG_DATA_HOME", "")
    base = Path(data_home) if os.path.isabs(data_home) else Path.home() / ".local" / "share"
    return base / "chargebook" / "station.sqlite"


def require_writable(path: Path) -> None:
    """Raise :class:`StoreError` in words unless the daemon can create or write the station
    database at ``path``: its folder (created if missing) and the file, if it exists."""
    folder = path.parent
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        raise StoreError(
            f"cannot create the folder {folder} for the station database: {error.strerror}; "
            "choose a writable place with --db FILE"
        ) from None
    if not os.access(folder, os.W_OK | os.X_OK):
        raise StoreError(
            f"the folder {folder} is not writable by this user, and the station database needs "
            "its -wal, -shm and lock files beside it; choose a writable place with --db FILE"
        )
    if path.exists() and not os.access(path, os.R_OK | os.W_OK):
        raise StoreError(
            f"the station database {path} is read-only for this user: the daemon must write "
            "to it; the read-side commands (sessions, show, export, verify) can read it as it "
            "is, or serve a writable copy"
        )


class NotAStation(StoreError):
    """The file exists but holds no chargebook record (empty, or schema version 0)."""


def require_station(path: Path) -> None:
    """Raise unless ``path`` is an existing station database, writing nothing to it.

    Raises :class:`NotFound` when there is no file, :class:`NotAStation` when the file holds no
    chargebook record (a 0-byte file, or SQLite at schema version 0), and :class:`StoreError`
    when it is not an SQLite database this user can read. A file at an older schema version
    passes: a writable open migrates it.
    """
    if not path.is_file():
        raise NotFound(f"no station database at {path} (pass --db FILE to choose one)")
    conn = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
    try:
        version = int(conn.execute("PRAGMA user_version").fetchone()[0])
    except sqlite3.DatabaseError as error:
        raise StoreError(f"{path} is not a usable chargebook database: {error}") from None
    finally:
        conn.close()
    if version == 0:
        raise NotAStation(
            f"{path} is not a station database (it holds no chargebook record); nothing was "
            "written: pass --db FILE naming a station database"
        )


def _writable(path: Path) -> bool:
    """Return True when this user can write the file ``path`` and create files beside it."""
    return os.access(path, os.W_OK) and os.access(path.parent, os.W_OK | os.X_OK)


def _require_intact(conn: sqlite3.Connection, path: Path) -> None:
    """Raise :class:`StoreError` when ``PRAGMA quick_check`` finds the file damaged."""
    found = [row[0] for row in conn.execute("PRAGMA quick_check(5)").fetchall()]
    if found != ["ok"]:
        raise StoreError(
            f"the file is damaged (SQLite's quick integrity check: "
            f"{'; '.join(str(f) for f in found)}); restore it from a backup, or start on a new "
            "file with --db FILE (`sqlite3 FILE .recover` may save what is left)"
        )


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
    uuid: str | None = None  # the session's global id (migration station_identity)

    def metadata(self) -> dict[str, Any]:
        return json_object(self.metadata_json)

    def plan(self) -> dict[str, Any]:
        return json_object(self.plan_json)


@dataclass(frozen=True, slots=True)
class ListedSession:
    """One session as a listing of thousands shows it: its row without the stored metadata and
    plan (what makes a row large), and the names its metadata holds (:data:`NAMED_KEYS`, a key
    it lacks left out), or None when they are not all text (decode the session's metadata)."""

    id: int
    created_at: str
    status: str
    convention: str
    beam: str
    replay_of: int | None
    uuid: str | None
    names: dict[str, str | None] | None


#: The columns of a listed session (:class:`ListedSession`, less its names), as stored.
LISTED_COLUMNS = "id, created_at, status, convention, beam, replay_of, uuid"


def names_in(metadata: Mapping[str, Any]) -> dict[str, str | None] | None:
    """Return the names of :data:`NAMED_KEYS` decoded ``metadata`` holds (a key it lacks left
    out), or None when one of them is something other than text or null."""
    names = {key: metadata[key] for key in NAMED_KEYS if key in metadata}
    if all(value is None or isinstance(value, str) for value in names.values()):
        return names
    return None


@dataclass(frozen=True, slots=True)
class StationRow:
    """The station that keeps this file: its global id and its configured name."""

    uuid: str
    name: str
    created_at: str


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
    account: str | None = None  # the Unix account of the client that asked, if one did

    def detail(self) -> dict[str, Any]:
        return json_object(self.detail_json)


@dataclass(frozen=True, slots=True)
class InputRow:
    """One input that changed a session, as logged: its ``kind`` (an ``inputs`` record's),
    who gave it (``actor``) and its fields (``detail()``); see ``acquire/engine/inputs.py``."""

    id: int
    session_id: int | None
    recorded_at: str
    kind: str
    actor: str
    detail_json: str
    account: str | None = None

    def detail(self) -> dict[str, Any]:
        return json_object(self.detail_json)


@dataclass(frozen=True, slots=True)
class TrafficRow:
    """One raw line sent to (``tx``) or received from (``rx``) the instrument."""

    id: int
    session_id: int | None
    t_s: float
    recorded_at: str
    direction: str
    line: bytes


#: The columns an event is appended with (its id and chain columns are added by _append).
_EVENT_COLUMNS = ("session_id", "recorded_at", "actor", "kind", "detail_json", "account")
#: The rows of a session after a given id, found by the id (the unary + keeps SQLite from
#: scanning the session's index instead: the cost is the new rows', not the session's).
_NEWER_OF_SESSION = "id > ? AND +session_id = ?"


@dataclass
class _KnownRows:
    """A session's sets (by id, oldest first) and readings as last read, the highest ids read,
    and the sets whose status changed since (see :meth:`Store.remember_rows`); ``current``
    once read: from then on the store's own writes keep them up to date, without reading."""

    sets: dict[int, SetRow] = field(default_factory=dict)
    readings: list[ReadingRow] = field(default_factory=list)
    by_set: dict[int, tuple[ReadingRow, ...]] = field(default_factory=dict)
    last_set_id: int = 0
    last_reading_id: int = 0
    stale: set[int] = field(default_factory=set)
    current: bool = False
    #: The session's row and its environment entries as last read (None: read them again).
    session: SessionRow | None = None
    environment: tuple[EnvironmentRow, ...] | None = None

    def add(self, sets: Iterable[SetRow], readings: list[ReadingRow]) -> None:
        """Take in sets (new, or with a new status) and new readings, in id order."""
        for row in sets:
            self.sets[row.id] = row
            self.last_set_id = max(self.last_set_id, row.id)
        self.readings += readings
        for set_id in dict.fromkeys(reading.set_id for reading in readings):
            self.by_set[set_id] = (
                *self.by_set.get(set_id, ()),
                *(reading for reading in readings if reading.set_id == set_id),
            )
        if self.readings:
            self.last_reading_id = self.readings[-1].id


#: How many chains' ends and rows' owners :class:`_Known` keeps before it starts again (a
#: daemon appends to one or two chains; a bulk import through the store to thousands).
_KNOWN_AT_MOST = 256


@dataclass
class _Known:
    """What the store's connection knows of the file without asking it again: the next id of
    each appended table, the ends of the chains (as committed, and as the open transaction
    moved them, written to ``chain_heads`` at its commit), the sessions known to exist and each
    known reading set's session. All of it is forgotten when another connection commits to the
    file (``PRAGMA data_version``, checked as each transaction begins) or a transaction fails."""

    data_version: int | None = None
    next_ids: dict[str, int] = field(default_factory=dict)
    heads: dict[int, tuple[int, str]] = field(default_factory=dict)
    heads_written: dict[int, tuple[int, str]] = field(default_factory=dict)
    sessions: set[int] = field(default_factory=set)
    set_sessions: dict[int, int] = field(default_factory=dict)

    def remember_head(self, key: int, head: tuple[int, str]) -> None:
        if len(self.heads) >= _KNOWN_AT_MOST:
            self.heads.clear()
        self.heads[key] = head

    def committed(self) -> None:
        """The open transaction committed: its chains' ends are the file's now."""
        for key, head in self.heads_written.items():
            self.remember_head(key, head)
        self.heads_written = {}
        if len(self.sessions) >= _KNOWN_AT_MOST or len(self.set_sessions) >= _KNOWN_AT_MOST:
            self.sessions.clear()
            self.set_sessions.clear()

    def saved(self) -> tuple[dict[str, int], dict[int, tuple[int, str]]]:
        """Return what a savepoint's rollback must put back (the rest stays true)."""
        return dict(self.next_ids), dict(self.heads_written)

    def restore(self, saved: tuple[dict[str, int], dict[int, tuple[int, str]]]) -> None:
        """Put back what :meth:`saved` returned: a savepoint was rolled back."""
        self.next_ids, self.heads_written = saved
        self.sessions.clear()  # a session created in the savepoint may have been noted
        self.set_sessions.clear()

    def forget(self) -> None:
        """Forget everything (the data version apart): the file is to be asked again."""
        self.next_ids.clear()
        self.heads.clear()
        self.heads_written = {}
        self.sessions.clear()
        self.set_sessions.clear()


Row = TypeVar("Row", SessionRow, SetRow, ReadingRow, EnvironmentRow, EventRow, TrafficRow, InputRow)
#: Told the row id of a kept raw line once it is written (None when its transaction failed).
LineIdListener = Callable[[int | None], None]
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


def _require_finite(field: str, value: object) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise InputError(field, value, "a finite number", "is not a finite number")
    return float(value)


def _finite_or_none(field: str, value: object) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise InputError(field, value, "a finite number or None", "is not a finite number")
    return float(value)


def json_object(text: str) -> dict[str, Any]:
    """Return the JSON object stored as ``text`` (metadata, plan or an event's detail, or a
    visit's row)."""
    loaded: dict[str, Any] = json.loads(text)
    return loaded


#: What :func:`_to_json` writes with: ``json.dumps(value, sort_keys=True, allow_nan=False,
#: ensure_ascii=False)``, the encoder made once (dumps makes one a call given these options).
_JSON = json.JSONEncoder(sort_keys=True, allow_nan=False, ensure_ascii=False)
#: The C part of that encoder, made once too (``encode`` makes it anew at every call: some
#: microseconds, and the input log encodes one sample's detail a poll), without the check for
#: a value that holds itself (then the recursion is caught, and ``encode`` names it). None
#: where Python has no C encoder.
_MAKE_C_ENCODER = getattr(json.encoder, "c_make_encoder", None)  # no type stub names it
_C_ENCODER = (
    _MAKE_C_ENCODER(
        None, _JSON.default, json.encoder.encode_basestring, None, ": ", ", ", True, False, False
    )
    if _MAKE_C_ENCODER is not None
    else None
)


def _to_json(field: str, value: object) -> str:
    allowed = "a dict of JSON values with finite numbers"
    if not isinstance(value, dict):
        raise InputError(field, value, allowed, "is not a dict")
    try:
        if _C_ENCODER is None:
            return _JSON.encode(value)
        try:
            return "".join(_C_ENCODER(value, 0))
        except RecursionError:
            return _JSON.encode(value)  # a value that holds itself: "Circular reference"
    except (TypeError, ValueError) as error:
        raise InputError(field, value, allowed, f"cannot be stored as JSON ({error})") from None


# -------------------------------------------------------------------------------------- store


class Store:
    """The station database. Every public write method commits before it returns."""

    def __init__(
        self, conn: sqlite3.Connection, path: Path | None, now: Callable[[], datetime] = utc_now
    ) -> None:
        """Wrap an open, migrated database. Use :meth:`open` or :meth:`memory` instead."""
        #: The connection every read and write goes through (plain sqlite3: a read-side
        #: command imports no sqlite-utils, which brings numpy, click and dateutil with it).
        self.conn = conn
        self._db: Database | None = None
        self.path = path
        self._now = now
        self._lock = threading.RLock()
        self._pending: list[TrafficLine] = []  # raw lines kept, written with the next commit
        self._pending_lock = threading.Lock()
        self._in_flight: list[TrafficLine] = []  # kept lines written in the open transaction
        #: Beside _pending and _in_flight: whom to tell each kept line's row id (None: nobody).
        self._pending_told: list[LineIdListener | None] = []
        self._in_flight_told: list[LineIdListener | None] = []
        self._snapshot: Path | None = None  # the private copy a read-only open reads, if any
        self._account: str | None = None  # the Unix account a client's request comes from
        #: Told the events of each transaction once it is committed, in the order written (the
        #: daemon broadcasts them from there instead of reading them back); None: nobody.
        self.on_events_committed: Callable[[list[EventRow]], None] | None = None
        self._events_in_flight: list[EventRow] = []  # written in the open transaction
        #: Per session, its sets and readings as last read (None: not kept; remember_rows).
        self._known: dict[int, _KnownRows] | None = None
        #: Called inside the transaction that closes a session (its status leaves open): the
        #: session's evaluated result as (evaluation stamp, JSON), kept in ``session_results``
        #: (``acquire.session.stored_result.stored_row``). None: no result is kept.
        self.results_on_close: Callable[[Store, int], tuple[str, str] | None] | None = None
        #: What this connection knows of the file without asking it again (see _Known).
        self._ids = _Known()
        #: Called at the start of every write block (:meth:`atomic`, nested ones too), the lock
        #: held: a writer that holds back rows of its own (a replay's raw lines, written a
        #: batch at a time) writes them there, so that they come first in the chain. None:
        #: nobody holds rows back.
        self.before_write: Callable[[], None] | None = None

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

        A writable open switches the file to WAL mode, and first checks that the file and its
        folder can be written and that the file passes SQLite's quick integrity check. A
        read-only open (the read-side commands, while a daemon may be writing) never creates or
        migrates: it requires an existing file at the current schema version. A file this user
        cannot write (an archive, a reviewer's copy, a read-only folder or mount), which SQLite
        cannot open even read-only in WAL mode, is read through a private snapshot copy, removed
        on :meth:`close`. Raises :class:`StoreError` naming the path when the file is missing,
        not a database, damaged, unwritable (writable open), or at another schema version.
        """
        path = Path(path).expanduser()
        if read_only and not path.is_file():
            raise StoreError(f"no station database at {path} (pass --db FILE to choose one)")
        if read_only:
            try:
                return cls._connect(path, path, read_only=True, now=now)
            except StoreError:
                if _writable(path):
                    raise
            return cls._open_snapshot(path, now)
        require_writable(path)
        store = cls._connect(path, path, read_only=False, now=now)
        return store

    @classmethod
    def _connect(
        cls, path: Path, file: Path, *, read_only: bool, now: Callable[[], datetime]
    ) -> Store:
        """Open ``file`` (``path`` itself, or a snapshot copy of it) and prepare it."""
        target = f"{file.resolve().as_uri()}?mode=ro" if read_only else str(file)
        conn = sqlite3.connect(target, uri=read_only, check_same_thread=False)
        try:
            if not read_only:
                _require_intact(conn, path)
            return cls._prepare(conn, path, read_only=read_only, now=now)
        except sqlite3.DatabaseError as error:
            conn.close()
            raise StoreError(f"{path} is not a usable chargebook database: {error}") from None
        except (SchemaTooNew, StoreError) as error:
            conn.close()
            raise StoreError(f"{path}: {error}") from None

    @classmethod
    def _open_snapshot(cls, path: Path, now: Callable[[], datetime]) -> Store:
        """Open a private copy of the unwritable file ``path`` (and its ``-wal``, whose
        committed transactions SQLite applies to the copy), read-only."""
        folder = Path(tempfile.mkdtemp(prefix="chargebook-snapshot-"))
        copy = folder / path.name
        try:
            shutil.copyfile(path, copy)
            wal = path.with_name(path.name + "-wal")
            if wal.is_file():
                shutil.copyfile(wal, copy.with_name(copy.name + "-wal"))
            store = cls._connect(path, copy, read_only=True, now=now)
        except OSError as error:
            shutil.rmtree(folder, ignore_errors=True)
            raise StoreError(f"{path} cannot be read: {error.strerror}") from None
        except BaseException:
            shutil.rmtree(folder, ignore_errors=True)
            raise
        store._snapshot = folder
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
        conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
        conn.execute("PRAGMA foreign_keys = ON")
        store = cls(conn, path, now)
        if read_only:
            # A read command scans whole tables of years of sessions: SQLite reads the pages
            # through a memory map instead of a system call and a copy per page (about a
            # third of the time of such a scan). Only where nothing is written.
            conn.execute(f"PRAGMA mmap_size = {READ_MMAP_BYTES}")
            version = schema_version(conn)
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
                store.db.enable_wal()
            conn.execute("PRAGMA synchronous = FULL")
            # A nested ``atomic`` block is a savepoint, whose undo copies of the pages it changes
            # (the statement journal) SQLite would write to a temporary file: a replay writes a
            # whole session in savepoints within one transaction, 0.6 s of a visit's 110,000
            # raw lines. Kept in memory, they cost a third of that.
            conn.execute("PRAGMA temp_store = MEMORY")
            migrate(store.db)
            restore_session_results(store.db)
        return store

    @property
    def db(self) -> Database:
        """The connection as sqlite-utils' Database (for migrating and savepoints), imported
        and made on first use: reading the record needs none of it."""
        if self._db is None:
            from sqlite_utils import Database

            self._db = Database(self.conn)
        return self._db

    def close(self) -> None:
        """Close the database connection (everything written is already committed)."""
        with self._lock:
            self.conn.close()
            if self._snapshot is not None:
                shutil.rmtree(self._snapshot, ignore_errors=True)
                self._snapshot = None

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    @property
    def schema_version(self) -> int:
        """Return the schema version of the open database."""
        with self._lock:
            return schema_version(self.conn)

    # ---------------------------------------------------------------------------- helpers

    @contextmanager
    def atomic(self) -> Iterator[Database]:
        """Hold the lock and run the block in one transaction, committed on exit.

        The outermost block begins IMMEDIATE: it takes the write lock first, so a concurrent
        writer (a replay, a reviewer's tool) makes it wait up to the busy timeout instead of
        failing at once, as a deferred transaction that read before writing did. A nested
        block is a savepoint: an error rolls back that block's rows only.

        The outermost block first writes the raw lines kept with :meth:`keep_traffic`, so that
        every row it appends comes after them in the session's chain, as it came after them in
        time; if the transaction fails, those lines are kept again for the next commit.
        """
        with self._lock:
            if self.before_write is not None:
                self.before_write()
            conn = self.conn
            if conn.in_transaction:
                written = len(self._events_in_flight)
                saved = self._ids.saved()
                try:
                    with self.db.atomic():  # a savepoint inside the open transaction
                        yield self.db
                except BaseException:
                    del self._events_in_flight[written:]  # rolled back with the savepoint
                    self._forget_known_rows()
                    self._ids.restore(saved)
                    raise
                return
            conn.execute("BEGIN IMMEDIATE")
            try:
                self._require_own_view()
                self._write_kept_traffic()
                yield self.db
                self._write_chain_heads()
            except BaseException:
                conn.rollback()
                self._keep_again()
                raise
            try:
                conn.execute("COMMIT")
            except BaseException:
                conn.rollback()
                self._keep_again()
                raise
            self._ids.committed()
            self._in_flight, self._in_flight_told = [], []
            self._tell_committed_events()

    def remember_rows(self) -> None:
        """Keep a session's sets and readings in memory from now on (of the session last read:
        the open one): :meth:`sets` and :meth:`readings` of it then read only the rows new or
        changed since they last did, so their cost does not grow with the session.

        Only for the one writer of the file (the daemon, which holds the station lock): the
        changes it knows of are its own writes (a set's status through :meth:`set_set_status`);
        a rolled-back transaction makes it read everything again.
        """
        with self._lock:
            if self._known is None:
                self._known = {}

    def _forget_known_rows(self) -> None:
        if self._known is not None:
            self._known.clear()

    def _known_rows(self, session_id: int) -> _KnownRows:
        """Return the session's rows as kept, brought up to date (lock held)."""
        assert self._known is not None
        if session_id not in self._known:
            self._known.clear()  # one session at a time (the open one): memory stays bounded
        known = self._known.setdefault(session_id, _KnownRows())
        if known.current:
            return known
        changed = [
            *self._select(
                SetRow, "reading_sets", _NEWER_OF_SESSION, (known.last_set_id, session_id)
            ),
            *(self._one(SetRow, "reading_sets", set_id, "reading set") for set_id in known.stale),
        ]
        known.stale.clear()
        rows = self._rows(
            ReadingRow, "readings", _NEWER_OF_SESSION, (known.last_reading_id, session_id)
        )
        known.add(changed, [_reading_row(row) for row in rows])
        known.current = True
        return known

    def _known_current(self, session_id: int) -> _KnownRows | None:
        """Return the session's kept rows if they are up to date, to be kept so by a write of
        this store (lock held); None when nothing, or nothing current, is kept of it."""
        if self._known is None:
            return None
        known = self._known.get(session_id)
        return known if known is not None and known.current else None

    def _keep_appended(self, table: str, row: dict[str, Any]) -> None:
        """Take a set or a reading this store just appended into the session's kept rows."""
        known = self._known_current(row["session_id"])
        if known is None:
            return
        if table == "reading_sets":
            known.add([_set_row(row)], [])
        elif table == "readings":
            known.add([], [_reading_row(tuple(row.get(name) for name in _READING_FIELDS))])

    def _tell_committed_events(self) -> None:
        """Hand the events of the transaction just committed to :attr:`on_events_committed`."""
        events, self._events_in_flight = self._events_in_flight, []
        if events and self.on_events_committed is not None:
            self.on_events_committed(events)

    def _write_kept_traffic(self) -> None:
        """Append the kept raw lines (lock held, transaction open) and tell each line's
        listener its row id."""
        with self._pending_lock:
            self._in_flight, self._pending = self._pending, []
            self._in_flight_told, self._pending_told = self._pending_told, []
        if self._in_flight:
            first_id = self._append_traffic(self._in_flight) - len(self._in_flight) + 1
            for offset, told in enumerate(self._in_flight_told):
                if told is not None:
                    told(first_id + offset)

    def _keep_again(self) -> None:
        """Put the lines of a failed transaction back in front of the kept ones (and forget
        its events: they were never committed)."""
        self._events_in_flight = []
        self._forget_known_rows()
        self._ids.forget()
        with self._pending_lock:
            self._pending[:0] = self._in_flight
            self._pending_told[:0] = self._in_flight_told
        for told in self._in_flight_told:
            if told is not None:
                told(None)  # not written after all: no row id yet
        self._in_flight, self._in_flight_told = [], []

    @contextmanager
    def busy_timeout(self, timeout_ms: int) -> Iterator[None]:
        """Hold the lock; in the block, wait at most ``timeout_ms`` for another writer's lock
        (instead of BUSY_TIMEOUT_MS)."""
        with self._lock:
            conn = self.conn
            conn.execute(f"PRAGMA busy_timeout = {int(timeout_ms)}")
            try:
                yield
            finally:
                conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")

    def checkpoint(self) -> None:
        """Copy every commit held in the ``-wal`` file into the database file itself."""
        with self._lock:
            self.conn.execute("PRAGMA wal_checkpoint(FULL)").fetchall()

    def _stamp(self) -> str:
        if self._now is utc_now:
            return utc_stamp_now()
        return self._now().astimezone(UTC).isoformat(timespec="microseconds")

    def _select(
        self, cls: type[Row], table: str, where: str, params: tuple[Any, ...] = ()
    ) -> list[Row]:
        return [cls(*row) for row in self._rows(cls, table, where, params)]

    def _rows(
        self, cls: type, table: str, where: str, params: tuple[Any, ...] = ()
    ) -> list[tuple[Any, ...]]:
        """Return the raw rows of ``table`` with the columns of ``cls``, ordered by id."""
        if not _storable(params):
            return []  # an id no SQLite row can have (a typed 10**30): nothing matches it
        sql = f"SELECT {_column_list(cls)} FROM {table} WHERE {where} ORDER BY id"
        with self._lock:
            return self.conn.execute(sql, params).fetchall()

    def _require_session(self, session_id: int) -> None:
        """Raise :class:`NotFound` unless session ``session_id`` is recorded (lock held). A
        session is never deleted, so one found is not looked up again."""
        if session_id not in self._ids.sessions:
            self._one(SessionRow, "sessions", session_id, "session")
            self._ids.sessions.add(session_id)

    def _session_of_set(self, set_id: int) -> int:
        """Return the session of reading set ``set_id`` (lock held); raise :class:`NotFound`
        when there is no such set. A set never changes session, nor is deleted."""
        session_id = self._ids.set_sessions.get(set_id)
        if session_id is None:
            session_id = self._one(SetRow, "reading_sets", set_id, "reading set").session_id
            self._ids.set_sessions[set_id] = session_id
        return session_id

    def _one(self, cls: type[Row], table: str, row_id: int, what: str) -> Row:
        found = self._select(cls, table, "id = ?", (row_id,))
        if not found:
            raise NotFound(f"no {what} with id {row_id} in {self.path or 'the database'}")
        return found[0]

    def _append(self, table: str, row: dict[str, Any]) -> int:
        """Append one row to a chained table, linked to its session's chain; return its id.

        Call inside :meth:`atomic`. The id is given explicitly (the next one), since the hash
        covers it; a session row starts its own chain. Columns of ``row`` that the chain does
        not cover (a status) are stored too; those it covers and ``row`` lacks are NULL.
        """
        row_id = self._next_id(table)
        self._set_next_id(table, row_id + 1)
        row = {"id": row_id, **row}
        values = tuple(row.get(column) for column in chain.columns_of(table))
        key = chain.chain_key(chain.owner(table, values))
        seq, previous = self._chain_head(key)
        digest = chain.link(previous, seq + 1, table, values)
        columns = [*row, "chain_seq", "chain_hash"]
        self.conn.execute(
            f"INSERT INTO {table} ({', '.join(columns)}) VALUES ({', '.join('?' * len(columns))})",
            (*row.values(), seq + 1, digest),
        )
        self._set_chain_head(key, seq + 1, digest)
        if table in _KEPT_TABLES:
            self._keep_appended(table, row)
        return row_id

    def append_visit_row(self, table: str, row: dict[str, Any]) -> int:
        """Append one row, as given (its columns but ``id`` and the chain's), to a visit table
        (``chain.VISIT_COLUMNS``) and commit it; return its id. ``record.visits`` checks the
        values and writes the row's event first, in the same transaction."""
        if table not in chain.VISIT_COLUMNS:
            raise InputError("table", table, ", ".join(chain.VISIT_COLUMNS), "is not a visit table")
        with self.atomic():
            return self._append(table, row)

    def _append_traffic(self, lines: Sequence[TrafficLine]) -> int:
        """Append checked raw lines, each linked to its session's chain, in one pass; return
        the id of the last."""
        next_id = self._next_id("traffic")
        rows: list[tuple[Any, ...]] = []
        one_session = len(set(map(_SESSION_OF, lines))) == 1
        start = 0
        while start < len(lines):  # a run of lines of one session at a time
            session_id = lines[start][0]
            end = len(lines) if one_session else start + 1
            while end < len(lines) and lines[end][0] == session_id:
                end += 1
            key = chain.chain_key(session_id)
            seq, digest = self._chain_head(key)
            rows += chain.traffic_rows(digest, seq, next_id, lines[start:end])
            self._set_chain_head(key, rows[-1][-2], rows[-1][-1])
            next_id += end - start
            start = end
        _insert_chained(self.conn, "traffic", rows)
        self._set_next_id("traffic", next_id)
        return next_id - 1

    def _next_id(self, table: str) -> int:
        """Return the id the next row appended to ``table`` takes (lock held, in a transaction);
        asked of the file once, then counted: ``_set_next_id`` says how many were taken."""
        found = self._ids.next_ids.get(table)
        if found is None:
            sql = f"SELECT coalesce(max(id), 0) + 1 FROM {table}"
            found = self._ids.next_ids[table] = int(self.conn.execute(sql).fetchone()[0])
        return found

    def _set_next_id(self, table: str, next_id: int) -> None:
        self._ids.next_ids[table] = next_id

    def _chain_head(self, key: int) -> tuple[int, str]:
        """Return (seq, hash) of the last row of chain ``key`` ((0, GENESIS) before the first):
        as this transaction left it, else as the file has it."""
        ids = self._ids
        found = ids.heads_written.get(key) or ids.heads.get(key)
        if found is None:
            row = self.conn.execute(
                "SELECT seq, hash FROM chain_heads WHERE session_key = ?", (key,)
            ).fetchone()
            found = (0, chain.GENESIS) if row is None else (int(row[0]), str(row[1]))
            ids.remember_head(key, found)
        return found

    def _set_chain_head(self, key: int, seq: int, digest: str) -> None:
        """Note the new end of chain ``key``; written to ``chain_heads`` once, at the commit."""
        self._ids.heads_written[key] = (seq, digest)

    def _write_chain_heads(self) -> None:
        """Write the ends of the chains this transaction appended to (lock held), in one pass."""
        written = self._ids.heads_written
        if written:
            self.conn.executemany(
                "INSERT INTO chain_heads (session_key, seq, hash) VALUES (?, ?, ?) "
                "ON CONFLICT (session_key) DO UPDATE SET seq = excluded.seq, hash = excluded.hash",
                [(key, seq, digest) for key, (seq, digest) in written.items()],
            )

    def _require_own_view(self) -> None:
        """Forget what this connection knows of the file when another connection committed to
        it since (``PRAGMA data_version`` moves only for others' commits); lock held, the
        write lock taken."""
        version = int(self.conn.execute("PRAGMA data_version").fetchone()[0])
        if version != self._ids.data_version:
            self._ids.forget()
            self._forget_known_rows()
            self._ids.data_version = version

    @contextmanager
    def on_behalf_of(self, account: str | None) -> Iterator[None]:
        """Within the block, record ``account`` (the Unix account of the client whose request
        is being carried out, from the socket's peer credentials) in the ``account`` column of
        every event written, beside the operator name the client claims (``actor``)."""
        with self._lock:
            previous, self._account = self._account, account
            try:
                yield
            finally:
                self._account = previous

    def _event(
        self, session_id: int | None, actor: str, kind: EventKind, detail: Mapping[str, object]
    ) -> int:
        event = EventRow(
            0,  # the id is the next one, given by _append
            session_id,
            self._stamp(),
            _require_text("actor", actor),
            events.check_detail(kind, detail).value,
            _to_json("detail", detail),
            self._account,
        )
        row = {name: getattr(event, name) for name in _EVENT_COLUMNS}
        event_id = self._append("events", row)
        if self.on_events_committed is not None:
            self._events_in_flight.append(replace(event, id=event_id))
        return event_id

    # ------------------------------------------------------------------------- sessions

    def create_session(
        self,
        metadata: dict[str, Any],
        plan: dict[str, Any],
        convention: str,
        beam: str,
        replay_of: int | None = None,
        actor: str = DAEMON_ACTOR,
    ) -> int:
        """Record a new open session and its ``session_created`` event; return its id.

        The session gets a random UUID (version 4), its id across stations, kept in its row and
        in the event (so that the hash chain covers it).
        """
        session_uuid = str(uuid.uuid4())
        row = {
            "created_at": self._stamp(),
            "status": "open",
            "metadata_json": _to_json("metadata", metadata),
            "plan_json": _to_json("plan", plan),
            "convention": _require_text("convention", convention),
            "beam": _require_text("beam", beam),
            "replay_of": replay_of,
            "uuid": session_uuid,
        }
        with self.atomic():
            if replay_of is not None:
                self._one(SessionRow, "sessions", replay_of, "session")
            session_id = self._append("sessions", row)
            created: events.SessionCreated = {
                "convention": convention,
                "beam": beam,
                "replay_of": replay_of,
                "uuid": session_uuid,
            }
            self._event(session_id, actor, EventKind.SESSION_CREATED, created)
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
            change: events.SessionStatus = {
                "from": old.status,
                "to": status,
                "reason": reason,
                "closed_at": closed_at,
            }
            # first: a trigger refuses a status change that is not its last event
            self._event(session_id, actor, EventKind.SESSION_STATUS, change)
            self.conn.execute(
                "UPDATE sessions SET status = ?, reason = ?, closed_at = ? WHERE id = ?",
                (status, reason, closed_at, session_id),
            )
            known = self._known_current(session_id)
            if known is not None:
                known.session = None  # read again, with its new status
            if status == "open":  # resumed: what it recorded before is no longer its result
                self.conn.execute("DELETE FROM session_results WHERE session_id = ?", (session_id,))
            elif self.results_on_close is not None:
                kept = self.results_on_close(self, session_id)
                if kept is not None:
                    self.put_session_result(session_id, *kept)

    def put_session_result(self, session_id: int, stamp: str, result_json: str) -> None:
        """Keep a closed session's evaluated result (replacing the one kept), with the stamp of
        the evaluation that computed it (``acquire.session.stored_result``)."""
        with self.atomic():
            self._require_session(session_id)
            restore_session_results(self.db)  # dropped while the daemon runs: keep it again
            self.conn.execute(
                "INSERT OR REPLACE INTO session_results "
                "(session_id, stamp, result_json, evaluated_at) VALUES (?, ?, ?, ?)",
                (session_id, _require_text("stamp", stamp), result_json, self._stamp()),
            )

    def session_results(
        self, session_ids: Iterable[int] | None = None
    ) -> dict[int, tuple[str, str]]:
        """Return the kept results of closed sessions (of ``session_ids``; None: all of them,
        one query either way): session id -> (stamp, JSON); {} when the file has lost its
        ``session_results`` table, or holds one of other columns (a cache: each session is then
        evaluated live, and a writable open keeps them again)."""
        sql = "SELECT session_id, stamp, result_json FROM session_results"
        params: tuple[str, ...] = ()
        if session_ids is not None:  # a history of one beam of thousands: only its sessions'
            sql += " WHERE " + _IN_JSON_IDS.format("session_id")
            params = (json.dumps([int(session_id) for session_id in session_ids]),)
        try:
            rows = self.read(sql, params)
        except sqlite3.OperationalError:
            if self.results_table() == "kept":
                raise
            return {}
        return {int(session_id): (str(stamp), str(text)) for session_id, stamp, text in rows}

    def keeps_results(self) -> bool:
        """Return True when the file has its ``session_results`` table (False: it was dropped
        or replaced by hand; the next writable open, or the next result kept, makes it again)."""
        return self.results_table() == "kept"

    def results_table(self) -> str:
        """Return "kept", "missing" or "other": what the file holds of ``session_results``
        (``migrations.session_results_shape``)."""
        with self._lock:
            return session_results_shape(self.conn)

    def sessions_without_result(self, stamp: str, limit: int) -> list[int]:
        """Return up to ``limit`` closed sessions, oldest first, whose kept result is missing
        or was computed by another evaluation than ``stamp`` (all of them when the table was
        dropped while the file was open: it is created again here, empty)."""
        with self.atomic():
            restore_session_results(self.db)
        rows = self.read(
            "SELECT s.id FROM sessions s LEFT JOIN session_results r ON r.session_id = s.id "
            "WHERE s.status != 'open' AND (r.stamp IS NULL OR r.stamp != ?) "
            "ORDER BY s.id LIMIT ?",
            (stamp, limit),
        )
        return [int(session_id) for (session_id,) in rows]

    def station(self) -> StationRow:
        """Return the station that keeps this file (its UUID and name)."""
        with self._lock:
            row = self.conn.execute("SELECT uuid, name, created_at FROM station").fetchone()
        return StationRow(*row)

    def name_station(self, name: str, actor: str = DAEMON_ACTOR) -> bool:
        """Give the station ``name`` (``serve --station-name``), recording the change as a
        ``station_named`` event outside any session; return False when it had that name."""
        name = _require_text("station name", name).strip()
        with self.atomic():
            old = self.station().name
            if old == name:
                return False
            renamed: events.StationNamed = {"from": old, "to": name}
            self._event(None, actor, EventKind.STATION_NAMED, renamed)
            self.conn.execute("UPDATE station SET name = ?", (name,))
        return True

    def sessions(self) -> list[SessionRow]:
        """Return every session, oldest first."""
        return self._select(SessionRow, "sessions", "1")

    def session(self, session_id: int) -> SessionRow:
        """Return one session. Raises :class:`NotFound` (a KeyError) when there is none.
        While rows are remembered (:meth:`remember_rows`), the open session's row is read once
        and again only after this store changed its status."""
        with self._lock:
            known = self._known_current(session_id)
            if known is not None and known.session is not None:
                return known.session
            row = self._one(SessionRow, "sessions", session_id, "session")
            if known is not None:
                known.session = row
        return row

    def sessions_of(self, session_ids: Iterable[int]) -> list[SessionRow]:
        """Return the sessions ``session_ids`` (those recorded), oldest first, in one query:
        a history reads the whole rows of one beam's sessions, not of the station's."""
        ids = json.dumps([int(session_id) for session_id in session_ids])
        return self._select(SessionRow, "sessions", _IN_JSON_IDS.format("id"), (ids,))

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
            self._require_session(session_id)
            return self._append("reading_sets", row)

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
            change: events.SetStatus = {
                "set_id": set_id,
                "step_key": old.step_key,
                "attempt": old.attempt,
                "from": old.status,
                "to": status,
                "reason": reason,
                "ended_at": ended_at,
            }
            # first: a trigger refuses a status change that is not its last event
            self._event(old.session_id, actor, EventKind.SET_STATUS, change)
            self.conn.execute(
                "UPDATE reading_sets SET status = ?, reason = ?, ended_at = ? WHERE id = ?",
                (status, reason, ended_at, set_id),
            )
            known = self._known_current(old.session_id)
            if known is not None:
                known.add([replace(old, status=status, reason=reason, ended_at=ended_at)], [])
            elif self._known is not None and old.session_id in self._known:
                self._known[old.session_id].stale.add(set_id)

    def sets(self, session_id: int) -> list[SetRow]:
        """Return the session's reading sets, oldest first (superseded attempts included)."""
        with self._lock:
            if self._known is not None:
                return list(self._known_rows(session_id).sets.values())
        return self._select(SetRow, "reading_sets", "session_id = ?", (session_id,))

    def session_names(self) -> dict[int, dict[str, str | None]]:
        """Return, per session id, the names of :data:`NAMED_KEYS` its metadata holds (a key
        it lacks is left out; a JSON null is None), read by SQLite's JSON functions: a listing
        of thousands of sessions does not decode each one's metadata. A session whose metadata
        holds one of them as something other than text is left out (decode it)."""
        try:
            rows = self.read(f"SELECT id, {_NAMES_EXTRACTED} FROM sessions")
        except sqlite3.OperationalError:  # metadata that is not JSON: each row decodes, and says
            return {}
        return self._names_of(rows)

    def listed_sessions(self) -> list[ListedSession]:
        """Return every session, oldest first, as a listing shows it (:class:`ListedSession`):
        one query, reading neither the stored metadata nor the plan into Python, which for
        thousands of sessions costs more than the rest of the listing."""
        sql = f"SELECT {LISTED_COLUMNS}, {{}} FROM sessions ORDER BY id"
        try:
            rows = self.read(sql.format(_NAMES_EXTRACTED))
            names = self._names_of((row[0], row[-1]) for row in rows)
        except sqlite3.OperationalError:  # metadata that is not JSON: each row decodes, and says
            rows, names = self.read(sql.format("NULL")), {}
        return [
            ListedSession(id_, created, status, convention, beam, replay_of, uuid, names.get(id_))
            for id_, created, status, convention, beam, replay_of, uuid, _ in rows
        ]

    def _names_of(self, rows: Iterable[tuple[int, str | None]]) -> dict[int, dict[str, str | None]]:
        """Return :meth:`session_names` from (session id, the array of its names that
        :data:`_NAMES_EXTRACTED` reads)."""
        names: dict[int, dict[str, str | None]] = {}
        unsure: list[int] = []
        decoded: dict[str | None, tuple[str, ...] | None] = {}  # a few machines, beams, people
        for session_id, text in rows:
            if text in decoded:
                values = decoded[text]
            else:
                values = decoded[text] = _text_names(text)
            if values is None:
                unsure.append(int(session_id))
            else:
                names[int(session_id)] = dict(zip(NAMED_KEYS, values, strict=True))
        if unsure:  # null or missing names, or names that are not text: looked at by type
            names.update(self._typed_names(unsure))
        return names

    def _typed_names(self, session_ids: list[int]) -> dict[int, dict[str, str | None]]:
        """Return :meth:`session_names` of the sessions ``session_ids``, each name read with its
        JSON type (one query)."""
        columns = ", ".join(
            f"json_type(metadata_json, '$.{key}'), json_extract(metadata_json, '$.{key}')"
            for key in NAMED_KEYS
        )
        rows = self.read(
            f"SELECT id, {columns} FROM sessions WHERE {_IN_JSON_IDS.format('id')}",
            (json.dumps(session_ids),),
        )
        names: dict[int, dict[str, str | None]] = {}
        for session_id, *values in rows:
            found: dict[str, str | None] = {}
            for key, kind, value in zip(NAMED_KEYS, values[::2], values[1::2], strict=True):
                if kind == "text" or kind == "null":
                    found[key] = value
                elif kind is not None:
                    break  # not a name: the caller decodes this session's metadata
            else:
                names[int(session_id)] = found
        return names

    def session_visits(self) -> dict[int, tuple[int, int]]:
        """Return, per session measuring a beam of a calibration visit, (the visit's id, the
        beam's position in it), in one query; a session of no visit is left out."""
        rows = self.read(
            "SELECT s.session_id, s.visit_id, b.position FROM visit_sessions s "
            "JOIN visit_beams b ON b.id = s.beam_id"
        )
        return {
            int(session_id): (int(visit), int(position)) for session_id, visit, position in rows
        }

    def set_counts(self) -> dict[int, tuple[int, int]]:
        """Return, per session id, (its reading sets, those accepted), in one query: a listing
        of every session does not read each session's sets."""
        rows = self.read(
            "SELECT session_id, count(*), sum(status = 'accepted') FROM reading_sets "
            "GROUP BY session_id"
        )
        return {int(session_id): (int(sets), int(accepted)) for session_id, sets, accepted in rows}

    def reading_counts(self) -> dict[int, int]:
        """Return, per session id, how many readings it holds, in one query."""
        rows = self.read("SELECT session_id, count(*) FROM readings GROUP BY session_id")
        return {int(session_id): int(count) for session_id, count in rows}

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
            owner = self._session_of_set(set_id)
            if owner != session_id:
                raise InputError(
                    "set_id",
                    set_id,
                    f"a reading set of session {session_id}",
                    f"belongs to session {owner}",
                )
            return self._append("readings", row)

    def readings(self, session_id: int, set_id: int | None = None) -> list[ReadingRow]:
        """Return the session's readings (of one set if ``set_id`` is given), oldest first."""
        if set_id is None:
            with self._lock:
                if self._known is not None:
                    return list(self._known_rows(session_id).readings)
            rows = self._rows(ReadingRow, "readings", "session_id = ?", (session_id,))
        else:
            with self._lock:
                if self._known is not None:
                    return list(self._known_rows(session_id).by_set.get(set_id, ()))
            rows = self._rows(
                ReadingRow, "readings", "session_id = ? AND set_id = ?", (session_id, set_id)
            )
        return [_reading_row(row) for row in rows]

    def readings_by_set(self, session_id: int) -> dict[int, tuple[ReadingRow, ...]]:
        """Return the session's readings by set id, oldest first within a set (a set without
        readings is absent). While rows are remembered (:meth:`remember_rows`), the readings of
        a set that gained none since the last call are the very tuple returned then."""
        with self._lock:
            if self._known is not None:
                return dict(self._known_rows(session_id).by_set)
        return group_by_set(self.readings(session_id))

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
            "humidity_pct": _finite_or_none("humidity_pct", humidity_pct),
            "source": _require_text("source", source),
        }
        with self.atomic():
            self._require_session(session_id)
            known = self._known_current(session_id)
            if known is not None:
                known.environment = None  # read again, with the new entry
            return self._append("environment", row)

    def environment(self, session_id: int) -> list[EnvironmentRow]:
        """Return the session's environment entries, oldest first (the last one is current).
        While rows are remembered (:meth:`remember_rows`), the open session's are read once
        and again only after this store added one."""
        with self._lock:
            known = self._known_current(session_id)
            if known is not None and known.environment is not None:
                return list(known.environment)
            rows = self._select(EnvironmentRow, "environment", "session_id = ?", (session_id,))
            if known is not None:
                known.environment = tuple(rows)
        return rows

    # ----------------------------------------------------------------------------- events

    def add_event(
        self, session_id: int | None, actor: str, kind: EventKind, detail: Mapping[str, object]
    ) -> int:
        """Record one audit event (who, what, and why in ``detail``); return its id.

        Raises InputError naming the kind and the key when ``detail`` is not the shape
        ``kind`` declares (``acquire/record/events.py``); nothing is written then.
        """
        with self.atomic():
            if session_id is not None:
                self._require_session(session_id)
            return self._event(session_id, actor, kind, detail)

    def events(self, session_id: int | None) -> list[EventRow]:
        """Return the session's events, oldest first (``None``: events outside any session)."""
        if session_id is None:
            return self._select(EventRow, "events", "session_id IS NULL")
        return self._select(EventRow, "events", "session_id = ?", (session_id,))

    def events_of_kind(self, kind: str) -> dict[int | None, list[EventRow]]:
        """Return the events of one kind by session id (None: outside any session), oldest
        first, in one query."""
        return group_by_session(self._select(EventRow, "events", "kind = ?", (kind,)))

    def read(self, sql: str, params: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
        """Return the rows of one query, run under the store's lock (for ``verify``)."""
        if not _storable(params):
            return []  # an id no SQLite row can have: nothing matches it
        with self._lock:
            return self.conn.execute(sql, params).fetchall()

    def chain_places(self, table: str, session_id: int) -> dict[int, int]:
        """Return row id -> place in the session's chain (``chain_seq``) for the session's rows
        of the chained ``table``: the order in which the session's rows happened, across
        tables, whatever the wall clock said."""
        if table not in chain.CHAINED_TABLES:
            raise InputError("table", table, ", ".join(chain.CHAINED_TABLES), "is not chained")
        with self._lock:
            rows = self.conn.execute(
                f"SELECT id, chain_seq FROM {table} WHERE session_id = ?", (session_id,)
            ).fetchall()
        return {int(row_id): int(seq) for row_id, seq in rows}

    def chained_rows(
        self, table: str, session_id: int | None, after_seq: int = 0
    ) -> list[tuple[Any, ...]]:
        """Return the rows of the chained ``table`` that belong to session ``session_id`` (None:
        outside sessions) past place ``after_seq`` of its chain, ordered by id: the values of
        ``chain.COLUMNS[table]``, then ``chain_seq`` and ``chain_hash`` (for ``verify`` and
        ``publish``)."""
        if table in chain.VISIT_COLUMNS:  # a visit's rows are all outside sessions
            sql = (
                f"SELECT {', '.join(chain.VISIT_COLUMNS[table])}, chain_seq, chain_hash "
                f"FROM {table} WHERE ? IS NULL AND (chain_seq IS NULL OR chain_seq > ?) "
                "ORDER BY id"
            )
            return self.read(sql, (session_id, after_seq))
        if table not in chain.CHAINED_TABLES:
            raise InputError("table", table, ", ".join(chain.CHAINED_TABLES), "is not chained")
        owner = "id" if table == "sessions" else "session_id"
        sql = (
            f"SELECT {', '.join(chain.COLUMNS[table])}, chain_seq, chain_hash FROM {table} "
            f"WHERE {owner} IS ? AND (chain_seq IS NULL OR chain_seq > ?) ORDER BY id"
        )
        return self.read(sql, (session_id, after_seq))

    def chain_head(self, session_id: int | None) -> tuple[int, str] | None:
        """Return (place, hash) of the last row the store recorded in the session's chain
        (None: outside sessions), or None when it recorded none."""
        key = chain.chain_key(session_id)
        with self._lock:
            if key in self._ids.heads_written:  # moved by the open transaction, not yet written
                return self._ids.heads_written[key]
            found = self.read("SELECT seq, hash FROM chain_heads WHERE session_key = ?", (key,))
        return (int(found[0][0]), str(found[0][1])) if found else None

    def last_event_of(self, kinds: Sequence[str]) -> EventRow | None:
        """Return the newest event of one of ``kinds``, in any session or none; None if none."""
        marks = ", ".join("?" for _ in kinds)
        found = self._select(
            EventRow,
            "events",
            f"id = (SELECT max(id) FROM events WHERE kind IN ({marks}))",
            tuple(kinds),
        )
        return found[0] if found else None

    # ------------------------------------------------------------------------- input log

    def add_inputs(
        self, session_id: int | None, entries: Sequence[tuple[str, str, dict[str, Any]]]
    ) -> int:
        """Log inputs that changed the session, each (kind, actor, detail), in order, in one
        transaction (the caller's, when inside :meth:`atomic`); return the last one's id.

        Written in one pass, like raw lines: a reading may bring thousands of samples with it.
        """
        stamp = self._stamp()
        rows = [
            (
                session_id,
                stamp,
                _require_text("kind", kind),
                _require_text("actor", actor),
                _to_json("detail", detail),
                self._account,
            )
            for kind, actor, detail in entries
        ]
        with self.atomic():
            next_id = self._next_id("inputs")
            key = chain.chain_key(session_id)
            seq, digest = self._chain_head(key)
            chained = []
            for offset, row in enumerate(rows):
                values = (next_id + offset, *row)
                seq += 1
                digest = chain.link_input(digest, seq, values)
                chained.append((*values, seq, digest))
            _insert_chained(self.conn, "inputs", chained)
            self._set_next_id("inputs", next_id + len(chained))
            if chained:
                self._set_chain_head(key, seq, digest)
        return next_id + len(rows) - 1 if rows else 0

    def inputs(self, session_id: int | None) -> list[InputRow]:
        """Return the session's logged inputs in the order they were applied (``None``:
        inputs outside any session)."""
        if session_id is None:
            return self._select(InputRow, "inputs", "session_id IS NULL")
        return self._select(InputRow, "inputs", "session_id = ?", (session_id,))

    # ---------------------------------------------------------------------------- traffic

    def add_traffic(self, session_id: int | None, t_s: float, direction: str, line: bytes) -> int:
        """Record one raw instrument line exactly as sent or received; return its id."""
        row = _traffic_row((session_id, t_s, self._stamp(), direction, line))
        with self.atomic():
            if session_id is not None:
                self._require_session(session_id)
            return self._append_traffic([row])

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
        with self.atomic():
            for session_id in {row[0] for row in rows if row[0] is not None}:
                self._require_session(session_id)
            self._append_traffic(rows)
        return len(rows)

    def keep_traffic(self, line: TrafficLine, told: LineIdListener | None = None) -> None:
        """Keep one raw line (see :meth:`add_traffic_many` for its shape) to be written with the
        next commit, before anything that commit appends: the order of the session's chain is
        the order in which lines and events happened. Cheap, and safe from any thread.

        ``told(row_id)`` is called when the line is written (``told(None)`` if that
        transaction fails): a sample read from the line then names it by id.
        """
        row = _traffic_row(line)
        with self._pending_lock:
            self._pending.append(row)
            self._pending_told.append(told)

    def keep_traffic_burst(
        self,
        session_id: int | None,
        t_s: float,
        recorded_at: str,
        direction: str,
        lines: Sequence[bytes],
        told: LineIdListener | None = None,
    ) -> None:
        """Keep raw lines that arrived together (one read) as :meth:`keep_traffic` keeps one:
        each is recorded with ``t_s``, ``recorded_at`` and ``direction``, checked once for
        the burst. ``told(row_id)`` is told the row id of the first line (the others follow
        it, one id each)."""
        if not lines:
            return
        first = _traffic_row((session_id, t_s, recorded_at, direction, lines[0]))
        if set(map(type, lines)) != {bytes}:
            raise InputError("line", lines, "the raw bytes of each line", "is not bytes")
        rows = list(zip(*(repeat(value) for value in first[:4]), lines, strict=False))
        with self._pending_lock:
            self._pending.extend(rows)
            self._pending_told.append(told)
            self._pending_told.extend(repeat(None, len(rows) - 1))

    def kept_traffic_count(self) -> int:
        """Return how many raw lines are kept, not yet committed (safe from any thread)."""
        with self._pending_lock:
            return len(self._pending) + len(self._in_flight)

    def take_kept_traffic(self) -> list[TrafficLine]:
        """Return the raw lines kept and not committed, in order, and forget them: what a
        daemon that stops while the record cannot commit sets aside in a file
        (``record.unrecorded``). Waits for a transaction in flight, so no line is in two places.
        """
        with self._lock, self._pending_lock:
            lines, self._pending, self._pending_told = self._pending, [], []
        return lines

    def commit_traffic(self) -> int:
        """Write the raw lines kept so far in one commit; return how many there were."""
        with self._pending_lock:
            count = len(self._pending)
        if count:
            with self.atomic():
                pass  # the outermost block writes the kept lines first
        return count

    def traffic_count(self, session_id: int | None) -> int:
        """Return how many raw lines were recorded for the session (``None``: outside any)."""
        where = "session_id IS NULL" if session_id is None else "session_id = ?"
        params = () if session_id is None else (session_id,)
        with self._lock:
            return int(
                self.conn.execute(f"SELECT count(*) FROM traffic WHERE {where}", params).fetchone()[
                    0
                ]
            )

    def newest_traffic_id(self) -> int:
        """Return the id of the newest raw line recorded (0 when there is none)."""
        with self._lock:
            return int(self.conn.execute("SELECT coalesce(max(id), 0) FROM traffic").fetchone()[0])

    def traffic(self, session_id: int | None) -> list[TrafficRow]:
        """Return the session's raw traffic in the order recorded (``None``: outside sessions)."""
        if session_id is None:
            return self._select(TrafficRow, "traffic", "session_id IS NULL")
        return self._select(TrafficRow, "traffic", "session_id = ?", (session_id,))

    def placed_inputs(self, session_id: int) -> list[tuple[int, str, str, str, int]]:
        """Return the session's logged inputs in the order they were applied, each as (id,
        kind, actor, detail as JSON text, place in the session's chain): what a replay feeds
        back, in one query, without a row object per input (a query-mode session logs one a
        poll)."""
        sql = (
            "SELECT id, kind, actor, detail_json, chain_seq FROM inputs WHERE session_id = ? "
            "ORDER BY id"
        )
        with self._lock:
            return self.conn.execute(sql, (session_id,)).fetchall()

    def placed_traffic(self, session_id: int) -> list[tuple[int, float, str, bytes, int]]:
        """Return the session's raw traffic in the order recorded, each line as (id, t_s,
        direction, line bytes, place in the session's chain): what a replay plays, in one
        query, without a row object per line (a session may hold a hundred thousand)."""
        sql = (
            "SELECT id, t_s, direction, line, chain_seq FROM traffic WHERE session_id = ? "
            "ORDER BY id"
        )
        with self._lock:
            return self.conn.execute(sql, (session_id,)).fetchall()

    def traffic_lines(self, session_id: int, ids: Iterable[int]) -> dict[int, bytes]:
        """Return the raw bytes of the session's traffic rows with these ids, by id (an id
        that is not one of the session's rows is left out): a few lines of a long session
        without reading all of it."""
        wanted = sorted({int(row_id) for row_id in ids})
        found: dict[int, bytes] = {}
        with self._lock:
            for start in range(0, len(wanted), 500):  # well within SQLite's bound on ? marks
                chunk = wanted[start : start + 500]
                marks = ", ".join("?" for _ in chunk)
                sql = f"SELECT id, line FROM traffic WHERE session_id = ? AND id IN ({marks})"
                found.update(self.conn.execute(sql, (session_id, *chunk)).fetchall())
        return found


_TRAFFIC_COLUMNS = ("session_id", "t_s", "recorded_at", "direction", "line")
_SESSION_OF = itemgetter(0)
#: The most rows one INSERT statement of :func:`_insert_chained` carries (8 values a traffic
#: row; fewer where the SQLite library takes fewer parameters a statement: 999 before 3.32).
ROWS_PER_INSERT = 512


def _insert_chained(conn: sqlite3.Connection, table: str, rows: Sequence[tuple[Any, ...]]) -> None:
    """Insert rows of a chained table (``traffic`` or ``inputs``), each its hashed columns then
    ``chain_seq`` and ``chain_hash``, in as few statements as carry them: ROWS_PER_INSERT rows
    a statement (or as many as the library's limit on parameters allows), the rest in
    statements of a power of two rows (a dozen texts, each prepared once). Every row passes
    the table's triggers and constraints as it would alone.

    One row a statement (``executemany``) would drop and take back the GIL around every row:
    the instrument thread, reading a streaming port meanwhile, would then hand it back and
    forth at each line, and the commit would wait a switch interval for it again and again.
    SQLite runs a statement of many rows without the GIL, beside that thread's work.
    """
    columns = len(chain.COLUMNS[table]) + 2
    most = max(
        min(ROWS_PER_INSERT, conn.getlimit(sqlite3.SQLITE_LIMIT_VARIABLE_NUMBER) // columns), 1
    )
    start, total = 0, len(rows)
    while start < total:
        left = total - start
        size = most if left >= most else 1 << (left.bit_length() - 1)
        values = list(chain_iterables.from_iterable(rows[start : start + size]))
        conn.execute(_insert_sql(table, size), values)
        start += size


@functools.cache
def _insert_sql(table: str, rows: int) -> str:
    """Return the INSERT of ``rows`` rows of chained ``table`` (see :func:`_insert_chained`)."""
    columns = (*chain.COLUMNS[table], "chain_seq", "chain_hash")
    one_row = f"({', '.join('?' for _ in columns)})"
    return f"INSERT INTO {table} ({', '.join(columns)}) VALUES {', '.join([one_row] * rows)}"


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


_READING_FIELDS = tuple(field.name for field in fields(ReadingRow))
_SETTLING = _READING_FIELDS.index("settling")
#: The tables whose rows a remembering store keeps (:meth:`Store.remember_rows`).
_KEPT_TABLES = ("reading_sets", "readings")


def _set_row(row: Mapping[str, Any]) -> SetRow:
    """Return a SetRow from the columns of an appended set (those it lacks None)."""
    values: list[Any] = [row.get(field.name) for field in fields(SetRow)]
    return SetRow(*values)


def _reading_row(row: tuple[Any, ...]) -> ReadingRow:
    """Return a ReadingRow from its raw columns, ``settling`` as a bool (stored 0 or 1)."""
    columns = list(row)
    columns[_SETTLING] = bool(columns[_SETTLING])
    return ReadingRow(*columns)


if TYPE_CHECKING:
    # The type checker holds the station file's store to the read side the reports use.
    _READS_AS_A_STATION: type[RecordReader] = Store
