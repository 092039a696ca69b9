"""The department record: the closed sessions of every station, in one PostgreSQL database.

Publishing (:func:`publish_station`) copies a station file's closed sessions (finished or
aborted) one way into the department database: every row of each session's hash chain (the
session, its reading sets, readings, environment entries, events, raw traffic and input log)
with its place and hash as recorded, keyed by the station's UUID and the row's id (a session's
UUID is unique across stations too). Each session is copied in one transaction, from the place
of its chain past the one already published: publishing twice adds nothing, a dropped connection
loses only the session being copied and publishing again resumes, and a review recorded later
(an event appended to the chain) is added by the next publish. Events outside sessions (the
instrument identified, the station renamed) are copied too; raw traffic outside sessions is not.
The station file is only read (a read-only open, as `show` does): the daemon goes on measuring,
and while the server is away the station works as before.

The department database is append-only: triggers refuse UPDATE, DELETE and TRUNCATE of every
table, whoever asks, and :func:`create_schema` makes two roles to grant to logins:
``chargebook_publisher`` (SELECT and INSERT: the stations) and ``chargebook_reader`` (SELECT).

:class:`DepartmentStore` reads one station's sessions back through the read methods the
reports use (:class:`~chargebook.acquire.record.reader.RecordReader`, which the station file's
:class:`~chargebook.acquire.record.store.Store` provides too), returning the same rows, so
`sessions`, `show`, `export` and `history` say the same from here as from the station file.

psycopg (the ``department`` extra) is imported only here, when a command opens the database.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, fields
from typing import TYPE_CHECKING, Any

from chargebook.acquire.record import chain
from chargebook.acquire.record.migrations import SESSION_FINAL_STATUSES
from chargebook.acquire.record.station_label import UUID_PREFIX_CHARS
from chargebook.acquire.record.store import (
    EnvironmentRow,
    EventRow,
    InputRow,
    ListedSession,
    NotFound,
    ReadingRow,
    Row,
    SessionRow,
    SetRow,
    StationRow,
    Store,
    StoreError,
    TrafficRow,
    _reading_row,
    group_by_session,
    group_by_set,
    names_in,
)
from chargebook.corrections.errors import InputError

if TYPE_CHECKING:
    from chargebook.acquire.record.reader import RecordReader

#: The PostgreSQL schema that holds the record, and the version of its layout.
SCHEMA = "chargebook"
LAYOUT_VERSION = 1
PUBLISHER_ROLE = "chargebook_publisher"
READER_ROLE = "chargebook_reader"
#: What a URL must start with to name a department database rather than a station file.
URL_PREFIXES = ("postgresql://", "postgres://")
INSTALL_HINT = "pip install 'chargebook[department]'"

#: Each copied table: the row class whose fields are its columns (what the reports read).
ROW_CLASSES: dict[str, type] = {
    "sessions": SessionRow,
    "reading_sets": SetRow,
    "readings": ReadingRow,
    "environment": EnvironmentRow,
    "events": EventRow,
    "traffic": TrafficRow,
    "inputs": InputRow,  # the input log: a published session can be replayed from its copy
}
_INTEGER = {
    "id",
    "session_id",
    "set_id",
    "seq",
    "step_index",
    "polarity",
    "attempt",
    "settling",
    "traffic_id",
    "replay_of",
}
_REAL = {"bias_V", "t_s", "charge_nC", "temperature_C", "pressure_kPa", "pressure_entered"}
_REAL |= {"humidity_pct"}


def is_department_url(text: object) -> bool:
    """Return True when ``text`` names a PostgreSQL database (postgresql://...)."""
    return isinstance(text, str) and text.startswith(URL_PREFIXES)


def shown_url(url: str) -> str:
    """Return ``url`` without its password, to name the database in messages."""
    return re.sub(r"(://[^:/@]*):[^@/]*@", r"\1:***@", url)


def _columns(table: str) -> tuple[str, ...]:
    return tuple(field.name for field in fields(ROW_CLASSES[table]))


def _column_type(name: str) -> str:
    if name in _INTEGER:
        return "bigint"
    if name in _REAL:
        return "double precision"
    return "bytea" if name == "line" else "text"


def _table_sql(table: str) -> str:
    columns = ",\n    ".join(f"{name} {_column_type(name)}" for name in _columns(table))
    unique = ",\n    UNIQUE (uuid)" if table == "sessions" else ""
    return f"""
CREATE TABLE IF NOT EXISTS {SCHEMA}.{table} (
    station_uuid text NOT NULL REFERENCES {SCHEMA}.stations (uuid),
    {columns},
    chain_seq bigint NOT NULL,
    chain_hash text NOT NULL,
    published_at timestamptz NOT NULL DEFAULT now(),
    PRIMARY KEY (station_uuid, id){unique}
)"""


_TABLES = ("stations", "station_names", *ROW_CLASSES, "chain_heads", "layout")


def _text(key: str) -> str:
    return f"m ->> '{key}'"


def _number(key: str) -> str:
    return f"(m ->> '{key}')::double precision"


def _first_review(key: str) -> str:
    return (
        f"(SELECT e.detail_json::jsonb ->> '{key}' FROM {SCHEMA}.events e "
        "WHERE e.station_uuid = s.station_uuid AND e.session_id = s.id "
        "AND e.kind = 'session_reviewed' ORDER BY e.id LIMIT 1)"
    )


#: The station file's ``session_overview`` view (migration ``browse_views``), across stations:
#: the same columns, after the station's UUID, for any PostgreSQL client.
_SESSION_OVERVIEW = f"""CREATE OR REPLACE VIEW {SCHEMA}.session_overview AS
SELECT
    s.station_uuid,
    s.id AS session_id,
    s.uuid AS session_uuid,
    (SELECT n.name FROM {SCHEMA}.station_names n WHERE n.station_uuid = s.station_uuid
        ORDER BY n.seq DESC LIMIT 1) AS station_name,
    s.created_at AS started_at_utc,
    s.closed_at AS closed_at_utc,
    s.status,
    s.reason,
    {_text("treatment_machine")} AS machine,
    coalesce({_text("beam")}, s.beam) AS beam,
    coalesce({_text("modality")}, 'photon') AS modality,
    s.convention,
    {_text("chamber_model")} AS chamber_model,
    {_text("chamber_serial")} AS chamber_serial,
    {_text("electrometer_model")} AS electrometer_model,
    {_text("electrometer_serial")} AS electrometer_serial,
    {_text("operator")} AS operator,
    {_number("N_Dw")} AS "N_Dw",
    coalesce({_text("N_Dw_unit")}, 'Gy/nC') AS "N_Dw_unit",
    {_number("k_Q")} AS "k_Q",
    {_text("k_Q_source")} AS "k_Q_source",
    {_number("expected_cGy_per_MU")} AS "expected_cGy_per_MU",
    {_text("calibration_date")} AS calibration_date,
    (SELECT count(*) FROM {SCHEMA}.readings r WHERE r.station_uuid = s.station_uuid
        AND r.session_id = s.id AND r.settling = 0) AS readings_used,
    {_first_review("status")} AS review,
    {_first_review("reviewer")} AS reviewer,
    s.replay_of AS replay_of_session_id
FROM {SCHEMA}.sessions s CROSS JOIN LATERAL (SELECT s.metadata_json::jsonb AS m) AS metadata"""


def _schema_statements() -> list[str]:
    """Return the statements that make the department record (each safe to run again)."""
    statements = [
        f"CREATE SCHEMA IF NOT EXISTS {SCHEMA}",
        f"""CREATE TABLE IF NOT EXISTS {SCHEMA}.stations (
    uuid text PRIMARY KEY,
    created_at text NOT NULL,
    published_at timestamptz NOT NULL DEFAULT now()
)""",
        f"""CREATE TABLE IF NOT EXISTS {SCHEMA}.station_names (
    station_uuid text NOT NULL REFERENCES {SCHEMA}.stations (uuid),
    seq bigint NOT NULL,
    name text NOT NULL,
    published_at timestamptz NOT NULL DEFAULT now(),
    PRIMARY KEY (station_uuid, seq)
)""",
        *(_table_sql(table) for table in ROW_CLASSES),
        f"""CREATE TABLE IF NOT EXISTS {SCHEMA}.chain_heads (
    station_uuid text NOT NULL REFERENCES {SCHEMA}.stations (uuid),
    session_key bigint NOT NULL,
    seq bigint NOT NULL,
    hash text NOT NULL,
    published_at timestamptz NOT NULL DEFAULT now(),
    PRIMARY KEY (station_uuid, session_key, seq)
)""",
        f"""CREATE TABLE IF NOT EXISTS {SCHEMA}.layout (
    version integer PRIMARY KEY,
    created_at timestamptz NOT NULL DEFAULT now()
)""",
        f"INSERT INTO {SCHEMA}.layout (version) VALUES ({LAYOUT_VERSION}) ON CONFLICT DO NOTHING",
        f"""CREATE OR REPLACE FUNCTION {SCHEMA}.refuse_change() RETURNS trigger
LANGUAGE plpgsql AS $$
BEGIN
    RAISE EXCEPTION '{SCHEMA}.%: the department record is append-only: % refused',
        TG_TABLE_NAME, TG_OP USING ERRCODE = 'integrity_constraint_violation';
END
$$""",
    ]
    for table in _TABLES:
        statements += [
            f"CREATE OR REPLACE TRIGGER {table}_append_only BEFORE UPDATE OR DELETE ON "
            f"{SCHEMA}.{table} FOR EACH ROW EXECUTE FUNCTION {SCHEMA}.refuse_change()",
            f"CREATE OR REPLACE TRIGGER {table}_no_truncate BEFORE TRUNCATE ON "
            f"{SCHEMA}.{table} FOR EACH STATEMENT EXECUTE FUNCTION {SCHEMA}.refuse_change()",
        ]
    statements.append(_SESSION_OVERVIEW)
    statements += [
        f"""DO $$ BEGIN
    IF NOT EXISTS (SELECT FROM pg_roles WHERE rolname = '{PUBLISHER_ROLE}') THEN
        CREATE ROLE {PUBLISHER_ROLE} NOLOGIN;
    END IF;
    IF NOT EXISTS (SELECT FROM pg_roles WHERE rolname = '{READER_ROLE}') THEN
        CREATE ROLE {READER_ROLE} NOLOGIN;
    END IF;
END $$""",
        f"REVOKE ALL ON ALL TABLES IN SCHEMA {SCHEMA} FROM PUBLIC",
        f"GRANT USAGE ON SCHEMA {SCHEMA} TO {PUBLISHER_ROLE}, {READER_ROLE}",
        f"GRANT SELECT, INSERT ON ALL TABLES IN SCHEMA {SCHEMA} TO {PUBLISHER_ROLE}",
        f"GRANT SELECT ON ALL TABLES IN SCHEMA {SCHEMA} TO {READER_ROLE}",
    ]
    return statements


# ----------------------------------------------------------------------------- connecting


class ReadFailed(StoreError):
    """The department database failed while a command read it (the server went away)."""


class PublishInterrupted(StoreError):
    """The connection was lost while publishing; what was committed before it stays."""

    def __init__(self, message: str, published: int) -> None:
        super().__init__(message)
        self.published = published


@dataclass
class DepartmentDatabase:
    """An open connection to the department database (autocommit; transactions explicit)."""

    connection: Any
    url: str

    @property
    def where(self) -> str:
        """Return the database's URL without its password, for messages."""
        return shown_url(self.url)

    def execute(self, sql: str, params: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
        """Return the rows of one statement (none for a statement that returns none)."""
        with self.connection.cursor() as cursor:
            cursor.execute(sql, params)
            return cursor.fetchall() if cursor.description is not None else []

    @contextmanager
    def transaction(self) -> Iterator[Any]:
        """Run the block in one transaction (committed at its end) and give it a cursor."""
        with self.connection.transaction(), self.connection.cursor() as cursor:
            yield cursor

    def read(self, sql: str, params: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
        """Return the rows of one query; :class:`ReadFailed` in words if the server fails."""
        import psycopg

        try:
            return self.execute(sql, params)
        except psycopg.Error as error:
            raise ReadFailed(
                f"reading the department record {self.where} failed: {_first_line(error)}"
            ) from None

    def stations(self) -> list[StationRow]:
        """Return every station published here (its newest name), in the order first seen."""
        rows = self.read(
            f"SELECT s.uuid, (SELECT n.name FROM {SCHEMA}.station_names n "
            f"WHERE n.station_uuid = s.uuid ORDER BY n.seq DESC LIMIT 1), s.created_at "
            f"FROM {SCHEMA}.stations s ORDER BY s.published_at, s.uuid"
        )
        return [StationRow(*row) for row in rows]

    def store(self, station: StationRow) -> DepartmentStore:
        """Return the reader of one station's published sessions."""
        return DepartmentStore(self, station)

    def close(self) -> None:
        """Close the connection."""
        self.connection.close()

    def __enter__(self) -> DepartmentDatabase:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()


def stations_named(database: DepartmentDatabase, choice: str | None) -> list[StationRow]:
    """Return the stations ``choice`` names (a UUID or its first UUID_PREFIX_CHARS characters
    or more, as listings show it beside a name stations share; or a name regardless of case),
    or all of them when it is None; InputError naming the stations published when none
    matches."""
    stations = database.stations()
    if choice is None:
        return stations
    key = choice.strip().lower()
    found = [s for s in stations if len(key) >= UUID_PREFIX_CHARS and s.uuid.startswith(key)]
    found = found or [s for s in stations if s.name.casefold() == choice.strip().casefold()]
    if len(found) == 1:
        return found
    names = ", ".join(f"{s.name} ({s.uuid})" for s in stations) or "none published yet"
    if not found:
        raise InputError("--station", choice, names, "is not a station of the department record")
    raise InputError("--station", choice, names, "names several stations: give its UUID")


def open_department(url: str, *, require_record: bool = True) -> DepartmentDatabase:
    """Return the department database at ``url`` (postgresql://...), connected.

    Raises :class:`StoreError` in words when psycopg is not installed, the server cannot be
    reached, or (``require_record``) the database holds no department record yet.
    """
    try:
        import psycopg
    except ImportError:
        raise StoreError(
            f"a department database ({shown_url(url)}) needs psycopg: {INSTALL_HINT}"
        ) from None
    try:
        connection = psycopg.connect(url, autocommit=True, connect_timeout=10)
    except psycopg.Error as error:
        raise StoreError(
            f"cannot reach the department database {shown_url(url)}: {_first_line(error)}"
        ) from None
    database = DepartmentDatabase(connection, url)
    if require_record:
        found = database.execute("SELECT to_regclass(%s)", (f"{SCHEMA}.layout",))
        if found[0][0] is None:
            database.close()
            raise StoreError(
                f"{database.where} holds no chargebook department record yet: its owner makes "
                f"one with `chargebook publish --to URL --create-schema`"
            )
    return database


def create_schema(database: DepartmentDatabase) -> None:
    """Make the department record's schema, tables, append-only triggers and the publisher and
    reader roles, if they are not there (safe to run again). Run as the database's owner."""
    with database.transaction() as cursor:
        for statement in _schema_statements():
            cursor.execute(statement)


def _first_line(error: BaseException) -> str:
    return (str(error).strip().splitlines() or [type(error).__name__])[0]


# ------------------------------------------------------------------------------ publishing


@dataclass(frozen=True, slots=True)
class Publication:
    """What one publish of a station did: sessions copied, already there, and left open."""

    station: StationRow
    sessions_published: int
    sessions_already: int
    sessions_not_closed: int
    rows: int


def _copy_sql(table: str) -> str:
    names = ("station_uuid", *_columns(table), "chain_seq", "chain_hash")
    return f"COPY {SCHEMA}.{table} ({', '.join(names)}) FROM STDIN"


def station_rows(
    store: Store, table: str, where: str, params: tuple[Any, ...]
) -> list[tuple[Any, ...]]:
    """Return the station file's rows of ``table`` to copy: its columns, place and hash."""
    sql = (
        f"SELECT {', '.join(_columns(table))}, chain_seq, chain_hash FROM {table} "
        f"WHERE {where} ORDER BY id"
    )
    return store.read(sql, params)


def _publish_station_row(database: DepartmentDatabase, station: StationRow) -> None:
    """Record the station, and its name when it is new or changed."""
    with database.transaction() as cursor:
        cursor.execute(
            f"INSERT INTO {SCHEMA}.stations (uuid, created_at) VALUES (%s, %s) "
            "ON CONFLICT DO NOTHING",
            (station.uuid, station.created_at),
        )
        cursor.execute(
            f"SELECT seq, name FROM {SCHEMA}.station_names WHERE station_uuid = %s "
            "ORDER BY seq DESC LIMIT 1",
            (station.uuid,),
        )
        newest = cursor.fetchone()
        if newest is None or newest[1] != station.name:
            cursor.execute(
                f"INSERT INTO {SCHEMA}.station_names (station_uuid, seq, name) VALUES (%s, %s, %s)",
                (station.uuid, 1 if newest is None else newest[0] + 1, station.name),
            )


def copy_rows(cursor: Any, table: str, station_uuid: str, rows: list[tuple[Any, ...]]) -> int:
    """Append ``rows`` (a station file's, as :func:`station_rows` gives them) to the
    department's ``table`` with PostgreSQL's COPY; return how many there were."""
    if rows:
        with cursor.copy(_copy_sql(table)) as copy:
            for row in rows:
                copy.write_row((station_uuid, *row))
    return len(rows)


def _hash_at(store: Store, session_id: int, seq: int) -> str | None:
    """Return the hash of the station file's row at place ``seq`` of the session's chain."""
    for table in ROW_CLASSES:
        owner = "id" if table == "sessions" else "session_id"
        found = store.read(
            f"SELECT chain_hash FROM {table} WHERE {owner} = ? AND chain_seq = ?", (session_id, seq)
        )
        if found:
            return str(found[0][0])
    return None


def _require_same_history(
    store: Store,
    station: StationRow,
    session: SessionRow,
    head: tuple[int, str] | None,
    published: tuple[int, str],
) -> None:
    """Refuse, in words, a station file whose chain of ``session`` is not the one published
    up to the place published (a replaced file, or one restored from an older copy)."""
    seq, digest = published
    if head is not None and head[0] >= seq and _hash_at(store, session.id, seq) == digest:
        return
    raise StoreError(
        f"session {session.id} ({session.uuid}) of station {station.name} ({station.uuid}) is "
        f"not the one in the department record, which holds its chain to place {seq} with "
        f"hash {digest[:16]}...: was the station file replaced, or restored from an older "
        "copy? Nothing more was published; `chargebook verify` checks the file"
    )


def _publish_session(
    database: DepartmentDatabase,
    store: Store,
    station: StationRow,
    session: SessionRow,
    published: tuple[int, str] | None,
) -> int:
    """Copy the session's chain past the place ``published`` (place, hash) in one transaction;
    return the rows copied."""
    head = store.chain_head(session.id)
    after = 0
    if published is not None:
        _require_same_history(store, station, session, head, published)
        after = published[0]
    if head is None or head[0] <= after:
        return 0
    copied = 0
    with database.transaction() as cursor:
        for table in ROW_CLASSES:
            owner = "id" if table == "sessions" else "session_id"
            where = f"{owner} = ? AND chain_seq > ? AND chain_seq <= ?"
            rows = station_rows(store, table, where, (session.id, after, head[0]))
            copied += copy_rows(cursor, table, station.uuid, rows)
        cursor.execute(
            f"INSERT INTO {SCHEMA}.chain_heads (station_uuid, session_key, seq, hash) "
            "VALUES (%s, %s, %s, %s)",
            (station.uuid, chain.chain_key(session.id), head[0], head[1]),
        )
    return copied


def _publish_events_outside(database: DepartmentDatabase, store: Store, station_uuid: str) -> int:
    """Copy the events recorded outside any session that are not published yet."""
    ((last,),) = database.execute(
        f"SELECT coalesce(max(id), 0) FROM {SCHEMA}.events "
        "WHERE station_uuid = %s AND session_id IS NULL",
        (station_uuid,),
    )
    rows = station_rows(store, "events", "session_id IS NULL AND id > ?", (last,))
    with database.transaction() as cursor:
        return copy_rows(cursor, "events", station_uuid, rows)


def published_heads(database: DepartmentDatabase, station_uuid: str) -> dict[int, tuple[int, str]]:
    """Return session id -> (place, hash) of the last row of its chain published, for one
    station."""
    rows = database.execute(
        f"SELECT DISTINCT ON (session_key) session_key, seq, hash FROM {SCHEMA}.chain_heads "
        "WHERE station_uuid = %s ORDER BY session_key, seq DESC",
        (station_uuid,),
    )
    return {int(key): (int(seq), str(digest)) for key, seq, digest in rows}


def publish_station(
    store: Store,
    database: DepartmentDatabase,
    on_session: Callable[[SessionRow, int], None] | None = None,
) -> Publication:
    """Publish the station's closed sessions not yet published (and later rows of those that
    are); return what was done. ``on_session(session, rows)`` is told of each session once it
    is committed.

    Raises :class:`PublishInterrupted` when the connection is lost (the sessions committed
    before stay; publishing again resumes), and :class:`StoreError` when the department holds
    other rows at a place this station's chain has (the station file was replaced).
    """
    import psycopg

    station = store.station()
    published = rows = already = 0
    try:
        _publish_station_row(database, station)
        heads = published_heads(database, station.uuid)
        sessions = store.sessions()
        closed = [s for s in sessions if s.status in SESSION_FINAL_STATUSES]
        for session in closed:
            copied = _publish_session(database, store, station, session, heads.get(session.id))
            if copied == 0:
                already += 1
                continue
            published, rows = published + 1, rows + copied
            if on_session is not None:
                on_session(session, copied)
        rows += _publish_events_outside(database, store, station.uuid)
    except psycopg.errors.UniqueViolation as error:
        raise StoreError(
            f"the department record {database.where} already holds other rows of station "
            f"{station.name} ({station.uuid}) at the same places: was the station file replaced "
            f"by another? Nothing of that session was published ({_first_line(error)})"
        ) from None
    except psycopg.OperationalError as error:
        raise PublishInterrupted(
            f"the connection to {database.where} was lost after {published} session(s) of "
            f"station {station.name} were published ({_first_line(error)}); publish again "
            "to resume: nothing is published twice",
            published,
        ) from None
    return Publication(station, published, already, len(sessions) - len(closed), rows)


# ------------------------------------------------------------------------------- reading


class DepartmentStore:
    """One station's published sessions, read as a :class:`RecordReader` (as a station's Store).

    Each method returns the rows the station file's :class:`Store` returns for the same
    call (as far as published: closed sessions and events outside sessions).
    """

    def __init__(self, database: DepartmentDatabase, station: StationRow) -> None:
        self.database = database
        self._station = station
        self.path = f"{database.where} (station {station.name})"

    def station(self) -> StationRow:
        """Return the station these sessions were published from (its newest name)."""
        return self._station

    def _rows(self, table: str, where: str, params: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
        sql = (
            f"SELECT {', '.join(_columns(table))} FROM {SCHEMA}.{table} "
            f"WHERE station_uuid = %s AND {where} ORDER BY id"
        )
        return self.database.read(sql, (self._station.uuid, *params))

    def _select(
        self, cls: type[Row], table: str, where: str, params: tuple[Any, ...] = ()
    ) -> list[Row]:
        return [cls(*row) for row in self._rows(table, where, params)]

    def _one(self, cls: type[Row], table: str, row_id: int, what: str) -> Row:
        found = self._select(cls, table, "id = %s", (row_id,))
        if not found:
            raise NotFound(f"no {what} with id {row_id} in {self.path}")
        return found[0]

    def sessions(self) -> list[SessionRow]:
        """Return every published session of the station, oldest first."""
        return self._select(SessionRow, "sessions", "TRUE")

    def listed_sessions(self) -> list[ListedSession]:
        """Return every published session of the station, oldest first, as a listing shows
        it: the names read from each one's decoded metadata."""
        return [
            ListedSession(
                row.id,
                row.created_at,
                row.status,
                row.convention,
                row.beam,
                row.replay_of,
                row.uuid,
                names_in(row.metadata()),
            )
            for row in self.sessions()
        ]

    def sessions_of(self, session_ids: Iterable[int]) -> list[SessionRow]:
        """Return the published sessions ``session_ids``, oldest first, in one query."""
        wanted = [int(session_id) for session_id in session_ids]
        return self._select(SessionRow, "sessions", "id = ANY(%s)", (wanted,))

    def session(self, session_id: int) -> SessionRow:
        """Return one session; NotFound when it is not published."""
        return self._one(SessionRow, "sessions", session_id, "session")

    def sets(self, session_id: int) -> list[SetRow]:
        """Return the session's reading sets, oldest first."""
        return self._select(SetRow, "reading_sets", "session_id = %s", (session_id,))

    def readings(self, session_id: int, set_id: int | None = None) -> list[ReadingRow]:
        """Return the session's readings (of one set if ``set_id`` is given), oldest first."""
        if set_id is None:
            rows = self._rows("readings", "session_id = %s", (session_id,))
        else:
            rows = self._rows("readings", "session_id = %s AND set_id = %s", (session_id, set_id))
        return [_reading_row(row) for row in rows]

    def readings_by_set(self, session_id: int) -> dict[int, tuple[ReadingRow, ...]]:
        """Return the session's readings by set id, oldest first within a set."""
        return group_by_set(self.readings(session_id))

    def environment(self, session_id: int) -> list[EnvironmentRow]:
        """Return the session's environment entries, oldest first."""
        return self._select(EnvironmentRow, "environment", "session_id = %s", (session_id,))

    def events(self, session_id: int | None) -> list[EventRow]:
        """Return the session's events, oldest first (None: events outside any session)."""
        if session_id is None:
            return self._select(EventRow, "events", "session_id IS NULL")
        return self._select(EventRow, "events", "session_id = %s", (session_id,))

    def set_counts(self) -> dict[int, tuple[int, int]]:
        """Return, per session id, (its reading sets, those accepted), in one query."""
        rows = self.database.read(
            f"SELECT session_id, count(*), count(*) FILTER (WHERE status = 'accepted') "
            f"FROM {SCHEMA}.reading_sets WHERE station_uuid = %s GROUP BY session_id",
            (self._station.uuid,),
        )
        return {int(session_id): (int(sets), int(accepted)) for session_id, sets, accepted in rows}

    def session_names(self) -> dict[int, dict[str, str | None]]:
        """Return {}: each session's names are read from its decoded metadata."""
        return {}

    def session_visits(self) -> dict[int, tuple[int, int]]:
        """Return {}: visits are not published to the department record (yet)."""
        return {}

    def session_results(
        self, session_ids: Iterable[int] | None = None
    ) -> dict[int, tuple[str, str]]:
        """Return {}: the department record keeps no evaluated results, so each of its sessions
        is evaluated from its published rows, by the reader's own code (whatever the version
        of the station that published it)."""
        return {}

    def reading_counts(self) -> dict[int, int]:
        """Return, per session id, how many readings it holds, in one query."""
        rows = self.database.read(
            f"SELECT session_id, count(*) FROM {SCHEMA}.readings WHERE station_uuid = %s "
            "GROUP BY session_id",
            (self._station.uuid,),
        )
        return {int(session_id): int(count) for session_id, count in rows}

    def events_of_kind(self, kind: str) -> dict[int | None, list[EventRow]]:
        """Return the events of one kind by session id (None: outside any session), oldest
        first, in one query."""
        return group_by_session(self._select(EventRow, "events", "kind = %s", (str(kind),)))

    def traffic(self, session_id: int | None) -> list[TrafficRow]:
        """Return the session's raw traffic in the order recorded."""
        if session_id is None:
            return self._select(TrafficRow, "traffic", "session_id IS NULL")
        return self._select(TrafficRow, "traffic", "session_id = %s", (session_id,))

    def traffic_count(self, session_id: int | None) -> int:
        """Return how many raw lines were published for the session."""
        where = "session_id IS NULL" if session_id is None else "session_id = %s"
        params = () if session_id is None else (session_id,)
        ((count,),) = self.database.read(
            f"SELECT count(*) FROM {SCHEMA}.traffic WHERE station_uuid = %s AND {where}",
            (self._station.uuid, *params),
        )
        return int(count)

    def chained_rows(
        self, table: str, session_id: int | None, after_seq: int = 0
    ) -> list[tuple[Any, ...]]:
        """Return the rows of the chained ``table`` of the session past place ``after_seq``,
        as :meth:`Store.chained_rows` does (the chain's columns, its place and hash)."""
        columns = chain.COLUMNS[table]
        owner = "id" if table == "sessions" else "session_id"
        sql = (
            f"SELECT {', '.join(columns)}, chain_seq, chain_hash FROM {SCHEMA}.{table} "
            f"WHERE station_uuid = %s AND {owner} IS NOT DISTINCT FROM %s AND chain_seq > %s "
            "ORDER BY id"
        )
        return self.database.read(sql, (self._station.uuid, session_id, after_seq))

    def chain_head(self, session_id: int | None) -> tuple[int, str] | None:
        """Return (place, hash) of the last row of the session's chain published, or None."""
        found = self.database.read(
            f"SELECT seq, hash FROM {SCHEMA}.chain_heads WHERE station_uuid = %s AND "
            "session_key = %s ORDER BY seq DESC LIMIT 1",
            (self._station.uuid, chain.chain_key(session_id)),
        )
        return (int(found[0][0]), str(found[0][1])) if found else None


if TYPE_CHECKING:
    # The type checker holds the department's reader to the read side the reports use.
    _READS_AS_A_STATION: type[RecordReader] = DepartmentStore
