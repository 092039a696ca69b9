"""The station database schema, as a list of named forward migrations.

The schema version is ``PRAGMA user_version``: the number of migrations applied. Each migration
runs inside one transaction together with its record in the ``migrations`` table and the new
``user_version``, so a database is always at exactly one version: a migration that fails leaves
the previous version untouched.

Migrations only ever move forward. A database written by a newer chargebook (a version above the
ones known here) is refused rather than guessed at.

Append-only tables (readings, environment, events, traffic) carry ``BEFORE UPDATE`` and
``BEFORE DELETE`` triggers that abort the statement, and (from ``chain_appended_rows``)
``BEFORE INSERT`` triggers that refuse a row whose id exists (``INSERT OR REPLACE`` would
otherwise delete it without a DELETE trigger firing) or that lacks its place in the hash chain.
Sessions and reading sets may change their status (the store records each change as an event,
and a trigger refuses a change that is not preceded by its event) but never their recorded
facts, and are never deleted.
"""

from __future__ import annotations

import re
import socket
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import TYPE_CHECKING

from chargebook.acquire.protocol import REGISTER_KINDS
from chargebook.acquire.record import chain

if TYPE_CHECKING:
    import sqlite3

    from sqlite_utils import Database

SESSION_STATUSES = ("open", "finished", "aborted", "interrupted")
#: A session in one of these states is closed for good: its status can no longer change.
SESSION_FINAL_STATUSES = ("finished", "aborted")
SET_PURPOSES = ("leakage", "warmup", "routine", "opposite", "reduced", "return_check")
SET_STATUSES = ("collecting", "reviewing", "accepted", "superseded", "interrupted", "aborted")
#: A reading set in one of these states is closed for good: its status can no longer change.
SET_FINAL_STATUSES = ("superseded", "aborted")
CAPTURE_MODES = ("auto", "pushed", "manual")
TRAFFIC_DIRECTIONS = ("tx", "rx")

APPEND_ONLY_TABLES = ("readings", "environment", "events", "traffic")
#: The event written before each register row, holding the row's whole content (a migration
#: keeps its own literal: ``EventKind.REGISTER_ROW`` has the same value).
REGISTER_EVENT = "register_row"
VISIT_STATUSES = ("open", "closed")
#: A visit in one of these states is closed for good.
VISIT_FINAL_STATUSES = ("closed",)


class SchemaTooNew(RuntimeError):
    """The database was written by a newer chargebook whose schema this one does not know."""


@dataclass(frozen=True, slots=True)
class Migration:
    """One forward step of the schema: ``apply`` runs inside the migration's transaction."""

    name: str
    apply: Callable[[Database], None]


def _sql_list(values: tuple[str, ...]) -> str:
    return ", ".join(f"'{value}'" for value in values)


def _refuse_update_trigger(table: str) -> str:
    return f"""
    CREATE TRIGGER {table}_refuse_update BEFORE UPDATE ON {table}
    BEGIN
        SELECT RAISE(ABORT, '{table} is append-only: a recorded row cannot be changed');
    END;
    """


def _append_only_triggers(table: str) -> str:
    return (
        _refuse_update_trigger(table)
        + f"""
    CREATE TRIGGER {table}_refuse_delete BEFORE DELETE ON {table}
    BEGIN
        SELECT RAISE(ABORT, '{table} is append-only: a recorded row cannot be deleted');
    END;
    """
    )


def _facts_fixed_trigger(table: str, fixed_columns: tuple[str, ...], final: tuple[str, ...]) -> str:
    changed = " OR ".join(f"NEW.{column} IS NOT OLD.{column}" for column in fixed_columns)
    return f"""
    CREATE TRIGGER {table}_refuse_fact_change BEFORE UPDATE ON {table}
    WHEN {changed}
    BEGIN
        SELECT RAISE(ABORT, '{table}: only the status of a recorded row may change');
    END;
    CREATE TRIGGER {table}_refuse_reopen BEFORE UPDATE OF status ON {table}
    WHEN OLD.status IN ({_sql_list(final)}) AND NEW.status IS NOT OLD.status
    BEGIN
        SELECT RAISE(ABORT, '{table}: a row whose status is final cannot change status');
    END;
    CREATE TRIGGER {table}_refuse_delete BEFORE DELETE ON {table}
    BEGIN
        SELECT RAISE(ABORT, '{table} rows are kept: a recorded row cannot be deleted');
    END;
    """


def _create_core_tables(db: Database) -> None:
    db.executescript(f"""
    CREATE TABLE sessions (
        id INTEGER PRIMARY KEY,
        created_at TEXT NOT NULL,
        status TEXT NOT NULL CHECK (status IN ({_sql_list(SESSION_STATUSES)})),
        metadata_json TEXT NOT NULL,
        plan_json TEXT NOT NULL,
        convention TEXT NOT NULL,
        beam TEXT NOT NULL,
        replay_of INTEGER REFERENCES sessions(id),
        closed_at TEXT,
        reason TEXT
    );
    CREATE TABLE reading_sets (
        id INTEGER PRIMARY KEY,
        session_id INTEGER NOT NULL REFERENCES sessions(id),
        step_index INTEGER NOT NULL CHECK (step_index >= 0),
        step_key TEXT NOT NULL,
        purpose TEXT NOT NULL CHECK (purpose IN ({_sql_list(SET_PURPOSES)})),
        polarity INTEGER NOT NULL CHECK (polarity IN (1, -1)),
        bias_V REAL NOT NULL,
        attempt INTEGER NOT NULL CHECK (attempt >= 1),
        status TEXT NOT NULL CHECK (status IN ({_sql_list(SET_STATUSES)})),
        reason TEXT,
        started_at TEXT NOT NULL,
        ended_at TEXT
    );
    CREATE TABLE readings (
        id INTEGER PRIMARY KEY,
        session_id INTEGER NOT NULL REFERENCES sessions(id),
        set_id INTEGER NOT NULL REFERENCES reading_sets(id),
        seq INTEGER NOT NULL,
        t_s REAL NOT NULL,
        charge_nC REAL NOT NULL,
        capture TEXT NOT NULL CHECK (capture IN ({_sql_list(CAPTURE_MODES)})),
        settling INTEGER NOT NULL CHECK (settling IN (0, 1)),
        status TEXT NOT NULL,
        traffic_id INTEGER REFERENCES traffic(id),
        recorded_at TEXT NOT NULL
    );
    CREATE TABLE environment (
        id INTEGER PRIMARY KEY,
        session_id INTEGER NOT NULL REFERENCES sessions(id),
        recorded_at TEXT NOT NULL,
        temperature_C REAL NOT NULL,
        pressure_kPa REAL NOT NULL,
        pressure_entered REAL NOT NULL,
        pressure_unit TEXT NOT NULL,
        humidity_pct REAL,
        source TEXT NOT NULL
    );
    CREATE TABLE events (
        id INTEGER PRIMARY KEY,
        session_id INTEGER REFERENCES sessions(id),
        recorded_at TEXT NOT NULL,
        actor TEXT NOT NULL,
        kind TEXT NOT NULL,
        detail_json TEXT NOT NULL
    );
    CREATE TABLE traffic (
        id INTEGER PRIMARY KEY,
        session_id INTEGER REFERENCES sessions(id),
        t_s REAL NOT NULL,
        recorded_at TEXT NOT NULL,
        direction TEXT NOT NULL CHECK (direction IN ({_sql_list(TRAFFIC_DIRECTIONS)})),
        line BLOB NOT NULL
    );
    {"".join(_append_only_triggers(table) for table in APPEND_ONLY_TABLES)}
    {
        _facts_fixed_trigger(
            "sessions",
            ("id", "created_at", "metadata_json", "plan_json", "convention", "beam", "replay_of"),
            SESSION_FINAL_STATUSES,
        )
    }
    {
        _facts_fixed_trigger(
            "reading_sets",
            (
                "id",
                "session_id",
                "step_index",
                "step_key",
                "purpose",
                "polarity",
                "bias_V",
                "attempt",
                "started_at",
            ),
            SET_FINAL_STATUSES,
        )
    }
    """)


def _index_rows_by_session(db: Database) -> None:
    db.executescript("""
    CREATE INDEX reading_sets_by_session ON reading_sets(session_id, step_index, attempt);
    CREATE INDEX readings_by_session ON readings(session_id, set_id, seq);
    CREATE INDEX environment_by_session ON environment(session_id);
    CREATE INDEX events_by_session ON events(session_id);
    CREATE INDEX traffic_by_session ON traffic(session_id);
    CREATE INDEX sessions_by_status ON sessions(status);
    """)


def _chain_triggers(table: str) -> str:
    return f"""
    CREATE TRIGGER {table}_refuse_replace BEFORE INSERT ON {table}
    WHEN EXISTS (SELECT 1 FROM {table} WHERE id = NEW.id)
    BEGIN
        SELECT RAISE(ABORT, '{table} is append-only: a recorded row cannot be replaced');
    END;
    CREATE TRIGGER {table}_refuse_unchained BEFORE INSERT ON {table}
    WHEN NEW.chain_seq IS NULL OR NEW.chain_hash IS NULL
    BEGIN
        SELECT RAISE(ABORT, '{table}: a row must be appended with its chain_seq and chain_hash');
    END;
    """


def _refuse_chain_change_trigger(table: str) -> str:
    return f"""
    CREATE TRIGGER {table}_refuse_chain_change BEFORE UPDATE OF chain_seq, chain_hash ON {table}
    BEGIN
        SELECT RAISE(ABORT, '{table}: the chain place and hash of a row cannot change');
    END;
    """


#: The stamp that orders the rows of a table when old files are chained (else recorded_at).
_STAMP_COLUMNS = {"sessions": "created_at", "reading_sets": "started_at"}


def _last_event_is(session: str, kind: str, matches: str) -> str:
    """Return SQL true when the newest event of ``session`` is a ``kind`` event whose detail
    ``matches`` (conditions on ``detail_json``)."""
    return f"""EXISTS (
        SELECT 1 FROM events
        WHERE id = (SELECT max(id) FROM events WHERE session_id = {session})
        AND kind = '{kind}' AND {matches})"""


def _detail_is(key: str, column: str) -> str:
    return f"json_extract(detail_json, '$.{key}') IS NEW.{column}"


_STATUS_AUDIT_TRIGGERS = f"""
    CREATE TRIGGER sessions_refuse_unaudited BEFORE UPDATE OF status, reason, closed_at
    ON sessions
    WHEN NOT {
    _last_event_is(
        "NEW.id",
        "session_status",
        " AND ".join(
            (
                _detail_is("to", "status"),
                _detail_is("reason", "reason"),
                _detail_is("closed_at", "closed_at"),
            )
        ),
    )
}
    BEGIN
        SELECT RAISE(ABORT, 'sessions: a status change must follow its session_status event');
    END;
    CREATE TRIGGER reading_sets_refuse_unaudited BEFORE UPDATE OF status, reason, ended_at
    ON reading_sets
    WHEN NOT {
    _last_event_is(
        "NEW.session_id",
        "set_status",
        " AND ".join(
            (
                _detail_is("set_id", "id"),
                _detail_is("to", "status"),
                _detail_is("reason", "reason"),
                _detail_is("ended_at", "ended_at"),
            )
        ),
    )
}
    BEGIN
        SELECT RAISE(ABORT, 'reading_sets: a status change must follow its set_status event');
    END;
"""


def _chain_appended_rows(db: Database) -> None:
    """Give every appended row its place and hash in its session's chain (see ``chain``).

    Rows already recorded are chained in the order of their stamps (then table, then id), the
    order replay used for them, so that old files verify and replay as before.
    """
    db.execute("ALTER TABLE events ADD COLUMN account TEXT")  # the client's Unix account
    for table in chain.FIRST_CHAINED_TABLES:
        db.execute(f"ALTER TABLE {table} ADD COLUMN chain_seq INTEGER")
        db.execute(f"ALTER TABLE {table} ADD COLUMN chain_hash TEXT")
    for table in APPEND_ONLY_TABLES:
        db.execute(f"DROP TRIGGER {table}_refuse_update")
    db.execute(
        "CREATE TABLE chain_heads ("
        "session_key INTEGER PRIMARY KEY, seq INTEGER NOT NULL, hash TEXT NOT NULL)"
    )
    order = ("sessions", "reading_sets", "traffic", "readings", "environment", "events")
    rank = {table: index for index, table in enumerate(order)}
    rows: list[tuple[int, str, int, str, tuple[object, ...]]] = []
    for table in chain.FIRST_CHAINED_TABLES:
        columns = chain.COLUMNS[table]
        stamped = _STAMP_COLUMNS.get(table, "recorded_at")
        sql = f"SELECT {', '.join(columns)}, {stamped} FROM {table}"
        for *values, stamp in db.execute(sql).fetchall():
            key = chain.chain_key(chain.owner(table, values))
            rows.append((key, stamp, rank[table], table, tuple(values)))
    heads: dict[int, tuple[int, str]] = {}
    for key, _stamp, _rank, table, values in sorted(
        rows, key=lambda r: (r[0], r[1], r[2], r[4][0])
    ):
        seq, previous = heads.get(key, (0, chain.GENESIS))
        digest = chain.link(previous, seq + 1, table, values)
        db.execute(
            f"UPDATE {table} SET chain_seq = ?, chain_hash = ? WHERE id = ?",
            (seq + 1, digest, values[0]),
        )
        heads[key] = (seq + 1, digest)
    db.conn.executemany(
        "INSERT INTO chain_heads (session_key, seq, hash) VALUES (?, ?, ?)",
        [(key, seq, digest) for key, (seq, digest) in heads.items()],
    )
    for table in APPEND_ONLY_TABLES:
        _run_triggers(db, _refuse_update_trigger(table))
    for table in chain.FIRST_CHAINED_TABLES:
        _run_triggers(db, _chain_triggers(table))
    for table in ("sessions", "reading_sets"):
        _run_triggers(db, _refuse_chain_change_trigger(table))
    _run_triggers(db, _STATUS_AUDIT_TRIGGERS)


def _run_statements(db: Database, sql: str) -> None:
    """Run the statements in ``sql`` (separated by ``;``, none holding one) one at a time,
    inside the open transaction (``executescript`` would commit it first)."""
    for statement in sql.split(";"):
        if statement.strip():
            db.execute(statement)


def _run_triggers(db: Database, sql: str) -> None:
    """Create the triggers in ``sql`` one statement at a time, inside the open transaction
    (``executescript`` would commit it first)."""
    for statement in sql.split("END;"):
        if statement.strip():
            db.execute(statement + "END;")


def session_uuid_at_migration(station_uuid: str, session_id: int) -> str:
    """Return the UUID the migration ``station_identity`` gives a session recorded before it:
    a name-based UUID (version 5) of the session id in the station's UUID as namespace, so
    that it is the same whenever it is computed again (and ``verify`` can check it)."""
    return str(uuid.uuid5(uuid.UUID(station_uuid), f"session {session_id}"))


def default_station_name() -> str:
    """Return the name a station gets until one is configured: the host name."""
    return socket.gethostname() or "station"


_STATION_TRIGGERS = """
    CREATE TRIGGER station_refuse_identity_change BEFORE UPDATE OF id, uuid, created_at ON station
    BEGIN
        SELECT RAISE(ABORT, 'station: the identity of a station cannot change');
    END;
    CREATE TRIGGER station_refuse_delete BEFORE DELETE ON station
    BEGIN
        SELECT RAISE(ABORT, 'station: the station row cannot be deleted');
    END;
    CREATE TRIGGER station_refuse_second BEFORE INSERT ON station
    WHEN EXISTS (SELECT 1 FROM station)
    BEGIN
        SELECT RAISE(ABORT, 'station: a file records one station');
    END;
    CREATE TRIGGER sessions_refuse_uuid_change BEFORE UPDATE OF uuid ON sessions
    BEGIN
        SELECT RAISE(ABORT, 'sessions: the uuid of a session cannot change');
    END;
    CREATE TRIGGER sessions_refuse_no_uuid BEFORE INSERT ON sessions
    WHEN NEW.uuid IS NULL
    BEGIN
        SELECT RAISE(ABORT, 'sessions: a session must be recorded with its uuid');
    END;
"""


def _station_identity(db: Database) -> None:
    """Give the file a station (a new random UUID and, until configured, the host name) and
    every session a UUID: sessions recorded before get :func:`session_uuid_at_migration`, new
    ones a random UUID (version 4) recorded in their ``session_created`` event too."""
    station_uuid = str(uuid.uuid4())
    db.execute(
        "CREATE TABLE station (id INTEGER PRIMARY KEY CHECK (id = 1), uuid TEXT NOT NULL, "
        "name TEXT NOT NULL, created_at TEXT NOT NULL)"
    )
    db.execute(
        "INSERT INTO station (id, uuid, name, created_at) VALUES (1, ?, ?, ?)",
        (
            station_uuid,
            default_station_name(),
            datetime.now(UTC).isoformat(timespec="microseconds"),
        ),
    )
    db.execute("ALTER TABLE sessions ADD COLUMN uuid TEXT")
    ids = [row[0] for row in db.execute("SELECT id FROM sessions").fetchall()]
    db.conn.executemany(
        "UPDATE sessions SET uuid = ? WHERE id = ?",
        [(session_uuid_at_migration(station_uuid, session_id), session_id) for session_id in ids],
    )
    db.execute("CREATE UNIQUE INDEX sessions_by_uuid ON sessions(uuid)")
    _run_triggers(db, _STATION_TRIGGERS)


_REGISTER_TABLE = f"""
    CREATE TABLE register_rows (
        id INTEGER PRIMARY KEY,
        kind TEXT NOT NULL CHECK (kind IN ({_sql_list(REGISTER_KINDS)})),
        entry_id INTEGER NOT NULL,
        supersedes INTEGER UNIQUE REFERENCES register_rows(id),
        effective_from TEXT NOT NULL,
        fields_json TEXT NOT NULL,
        recorded_at TEXT NOT NULL,
        event_id INTEGER NOT NULL UNIQUE REFERENCES events(id)
    )
"""


def _register_triggers() -> str:
    detail = "json_extract(detail_json, '$.{}') IS NEW.{}".format
    audited = " AND ".join(
        (
            "id = NEW.event_id",
            "id = (SELECT max(id) FROM events)",
            "session_id IS NULL",
            f"kind = '{REGISTER_EVENT}'",
            detail("row", "id"),
            detail("kind", "kind"),
            detail("entry", "entry_id"),
            detail("supersedes", "supersedes"),
            detail("effective_from", "effective_from"),
            "recorded_at IS NEW.recorded_at",
        )
    )
    return f"""
    {_refuse_update_trigger("register_rows")}
    CREATE TRIGGER register_rows_refuse_delete BEFORE DELETE ON register_rows
    BEGIN
        SELECT RAISE(ABORT, 'register_rows: a register row is kept: supersede it instead');
    END;
    CREATE TRIGGER register_rows_refuse_replace BEFORE INSERT ON register_rows
    WHEN EXISTS (SELECT 1 FROM register_rows WHERE id = NEW.id)
    BEGIN
        SELECT RAISE(ABORT, 'register_rows: a recorded row cannot be replaced');
    END;
    CREATE TRIGGER register_rows_refuse_unaudited BEFORE INSERT ON register_rows
    WHEN NOT EXISTS (SELECT 1 FROM events WHERE {audited})
    BEGIN
        SELECT RAISE(ABORT, 'register_rows: a row must follow its register_row event');
    END;
    CREATE TRIGGER register_rows_refuse_bad_entry BEFORE INSERT ON register_rows
    WHEN (NEW.supersedes IS NULL AND NEW.entry_id IS NOT NEW.id)
    OR (NEW.supersedes IS NOT NULL AND NOT EXISTS (
        SELECT 1 FROM register_rows
        WHERE id = NEW.supersedes AND entry_id = NEW.entry_id AND kind = NEW.kind))
    BEGIN
        SELECT RAISE(ABORT, 'register_rows: a row supersedes a row of its own entry and kind');
    END;
    """


def _registers(db: Database) -> None:
    """Add the station's registers (``register_rows``): append-only rows, each written after
    its ``register_row`` event (in the chain of rows outside sessions), edited by superseding."""
    db.execute(_REGISTER_TABLE)
    db.execute("CREATE INDEX register_rows_by_entry ON register_rows(entry_id)")
    _run_triggers(db, _register_triggers())


#: The views a physicist reads when browsing a station file (Datasette, the sqlite3 shell): one
#: row per session with its metadata out of the JSON, readings with their set, traffic as text.
#: They read the tables as stored; results (k_TP, dose ...) are computed by chargebook, not here.
_BROWSE_VIEWS = """
    CREATE VIEW session_overview AS
    SELECT
        s.id AS session_id,
        s.uuid AS session_uuid,
        (SELECT name FROM station) AS station_name,
        s.created_at AS started_at_utc,
        s.closed_at AS closed_at_utc,
        s.status,
        s.reason,
        json_extract(s.metadata_json, '$.treatment_machine') AS machine,
        coalesce(json_extract(s.metadata_json, '$.beam'), s.beam) AS beam,
        coalesce(json_extract(s.metadata_json, '$.modality'), 'photon') AS modality,
        s.convention,
        json_extract(s.metadata_json, '$.chamber_model') AS chamber_model,
        json_extract(s.metadata_json, '$.chamber_serial') AS chamber_serial,
        json_extract(s.metadata_json, '$.electrometer_model') AS electrometer_model,
        json_extract(s.metadata_json, '$.electrometer_serial') AS electrometer_serial,
        json_extract(s.metadata_json, '$.operator') AS operator,
        json_extract(s.metadata_json, '$.N_Dw') AS N_Dw,
        coalesce(json_extract(s.metadata_json, '$.N_Dw_unit'), 'Gy/nC') AS N_Dw_unit,
        json_extract(s.metadata_json, '$.k_Q') AS k_Q,
        json_extract(s.metadata_json, '$.k_Q_source') AS k_Q_source,
        json_extract(s.metadata_json, '$.expected_cGy_per_MU') AS expected_cGy_per_MU,
        json_extract(s.metadata_json, '$.calibration_date') AS calibration_date,
        (SELECT count(*) FROM readings r WHERE r.session_id = s.id AND r.settling = 0)
            AS readings_used,
        (SELECT json_extract(e.detail_json, '$.status') FROM events e
            WHERE e.session_id = s.id AND e.kind = 'session_reviewed' ORDER BY e.id LIMIT 1)
            AS review,
        (SELECT json_extract(e.detail_json, '$.reviewer') FROM events e
            WHERE e.session_id = s.id AND e.kind = 'session_reviewed' ORDER BY e.id LIMIT 1)
            AS reviewer,
        s.replay_of AS replay_of_session_id
    FROM sessions s;
    CREATE VIEW reading_overview AS
    SELECT
        r.id AS reading_id,
        r.session_id,
        r.set_id,
        rs.step_index,
        rs.purpose,
        rs.polarity,
        rs.bias_V,
        rs.attempt,
        rs.status AS set_status,
        r.seq,
        r.charge_nC,
        r.settling,
        r.capture,
        r.status AS instrument_status,
        r.t_s,
        r.recorded_at AS recorded_at_utc
    FROM readings r JOIN reading_sets rs ON rs.id = r.set_id;
    CREATE VIEW traffic_text AS
    SELECT
        id AS line_id,
        session_id,
        t_s,
        recorded_at AS recorded_at_utc,
        CASE direction WHEN 'tx' THEN 'sent' ELSE 'received' END AS direction,
        rtrim(CAST(line AS TEXT), char(13, 10)) AS line_text,
        hex(line) AS line_hex
    FROM traffic;
"""


def _browse_views(db: Database) -> None:
    """Add the read-only views of :data:`_BROWSE_VIEWS` (``session_overview``,
    ``reading_overview``, ``traffic_text``)."""
    _run_statements(db, _BROWSE_VIEWS)


def _input_log(db: Database) -> None:
    """Add the input log: every input that changed a session (an operator action with its
    actor, an environment entry, a sample the engine consumed, a tick that ended a wait, the
    instrument lost or back, a restart), one chained, append-only row each, written in the
    transaction of its effects (``acquire/engine/inputs.py`` holds the records).

    Sessions recorded before have no input log, and none is made up for them from their
    effects: replay refuses them in words (a session's log begins with its ``session_start``).
    """
    db.execute(
        "CREATE TABLE inputs ("
        "id INTEGER PRIMARY KEY, session_id INTEGER REFERENCES sessions(id), "
        "recorded_at TEXT NOT NULL, kind TEXT NOT NULL, actor TEXT NOT NULL, "
        "detail_json TEXT NOT NULL, account TEXT, chain_seq INTEGER, chain_hash TEXT)"
    )
    db.execute("CREATE INDEX inputs_by_session ON inputs(session_id)")
    _run_triggers(db, _append_only_triggers("inputs") + _chain_triggers("inputs"))


def _visits_tables() -> str:
    return f"""
    CREATE TABLE visits (
        id INTEGER PRIMARY KEY,
        uuid TEXT NOT NULL UNIQUE,
        created_at TEXT NOT NULL,
        machine TEXT NOT NULL,
        metadata_json TEXT NOT NULL,
        status TEXT NOT NULL CHECK (status IN ({_sql_list(VISIT_STATUSES)})),
        closed_at TEXT,
        reason TEXT,
        chain_seq INTEGER,
        chain_hash TEXT
    );
    CREATE TABLE visit_beams (
        id INTEGER PRIMARY KEY,
        visit_id INTEGER NOT NULL REFERENCES visits(id),
        position INTEGER NOT NULL CHECK (position >= 1),
        name TEXT NOT NULL COLLATE NOCASE,
        plan TEXT NOT NULL,
        metadata_json TEXT NOT NULL,
        register_ids_json TEXT NOT NULL,
        recorded_at TEXT NOT NULL,
        chain_seq INTEGER,
        chain_hash TEXT,
        UNIQUE (visit_id, name),
        UNIQUE (visit_id, position)
    );
    CREATE TABLE visit_sessions (
        id INTEGER PRIMARY KEY,
        visit_id INTEGER NOT NULL REFERENCES visits(id),
        beam_id INTEGER NOT NULL REFERENCES visit_beams(id),
        session_id INTEGER NOT NULL UNIQUE REFERENCES sessions(id),
        recorded_at TEXT NOT NULL,
        chain_seq INTEGER,
        chain_hash TEXT
    );
    CREATE INDEX visit_beams_by_visit ON visit_beams(visit_id, position);
    CREATE INDEX visit_sessions_by_visit ON visit_sessions(visit_id, beam_id);
    """


_VISIT_STATUS_AUDIT = """
    CREATE TRIGGER visits_refuse_unaudited BEFORE UPDATE OF status, reason, closed_at ON visits
    WHEN NOT EXISTS (
        SELECT 1 FROM events
        WHERE id = (SELECT max(id) FROM events WHERE session_id IS NULL)
        AND kind = 'visit_status' AND json_extract(detail_json, '$.visit_id') IS NEW.id
        AND json_extract(detail_json, '$.to') IS NEW.status
        AND json_extract(detail_json, '$.reason') IS NEW.reason
        AND json_extract(detail_json, '$.closed_at') IS NEW.closed_at)
    BEGIN
        SELECT RAISE(ABORT, 'visits: a status change must follow its visit_status event');
    END;
"""


def _visits(db: Database) -> None:
    """Add calibration visits: one sitting at one machine, several beams, one session each.

    ``visits`` changes only its status (each change a ``visit_status`` event outside sessions,
    written first); ``visit_beams`` (the beams in the order the physicist added them) and
    ``visit_sessions`` (the session measuring a beam) are append-only. All three are chained
    with the rows outside any session (``chain.VISIT_COLUMNS``)."""
    _run_statements(db, _visits_tables())
    triggers = _facts_fixed_trigger(
        "visits", ("id", "uuid", "created_at", "machine", "metadata_json"), VISIT_FINAL_STATUSES
    )
    triggers += _chain_triggers("visits") + _refuse_chain_change_trigger("visits")
    for table in ("visit_beams", "visit_sessions"):
        triggers += _append_only_triggers(table) + _chain_triggers(table)
    _run_triggers(db, triggers + _VISIT_STATUS_AUDIT)


def _session_results(db: Database) -> None:
    """Add ``session_results``: each closed session's evaluated result (what ``history``
    lists), written in the transaction that closes the session, with the evaluation stamp of
    the code that computed it. A derived copy, not a record: outside the hash chain, replaced
    when the evaluation changes (a row whose stamp is not the running code's is never used).
    Sessions recorded before have no row until the daemon refreshes them."""
    db.execute(
        "CREATE TABLE session_results ("
        "session_id INTEGER PRIMARY KEY REFERENCES sessions(id), "
        "stamp TEXT NOT NULL, result_json TEXT NOT NULL, evaluated_at TEXT NOT NULL)"
    )


#: The columns of ``session_results`` as its migration makes them, in order.
SESSION_RESULTS_COLUMNS = ("session_id", "stamp", "result_json", "evaluated_at")


def session_results_shape(conn: sqlite3.Connection) -> str:
    """Return what the file holds of ``session_results``: "kept" (the table its migration
    made), "missing" (none), or "other" (a table of that name with other columns, or a view,
    made by hand: not one chargebook can read or write)."""
    found = conn.execute("SELECT type FROM sqlite_master WHERE name = 'session_results'")
    kind = found.fetchone()
    if kind is None:
        return "missing"
    columns = tuple(row[1] for row in conn.execute("PRAGMA table_info(session_results)"))
    return "kept" if kind[0] == "table" and columns == SESSION_RESULTS_COLUMNS else "other"


def restore_session_results(db: Database) -> bool:
    """Create ``session_results`` again when it is missing from a file migrated past it (the
    table dropped by hand: it is a cache, not the record), by the very statement its migration
    ran; return True when it was missing. The daemon then keeps each session's result again.

    A table of that name with other columns is not chargebook's: it is renamed, not dropped
    (``session_results_set_aside``, then ``_2``, ...: whatever it holds stays in the file),
    and the cache is made anew beside it."""
    shape = session_results_shape(db.conn)
    if shape == "kept":
        return False
    if shape == "other":
        _set_aside_session_results(db)
    _session_results(db)
    return True


def _set_aside_session_results(db: Database) -> None:
    """Rename a ``session_results`` that is not chargebook's to the first free name of
    ``session_results_set_aside``, ``_2``, ...: a table keeps its rows, a view its query."""
    kind, sql = db.conn.execute(
        "SELECT type, sql FROM sqlite_master WHERE name = 'session_results'"
    ).fetchone()
    taken = {name for (name,) in db.conn.execute("SELECT name FROM sqlite_master")}
    aside = next(
        name
        for n in range(1, len(taken) + 2)
        if (name := "session_results_set_aside" + ("" if n == 1 else f"_{n}")) not in taken
    )
    if kind == "view":  # SQLite renames no view: made again under the new name
        db.execute("DROP VIEW session_results")
        db.execute(re.sub(r"session_results", aside, sql, count=1))
    else:
        db.execute(f"ALTER TABLE session_results RENAME TO {aside}")


def _input_log_sample_runs(db: Database) -> None:
    """Mark the files whose input log may hold ``sample_run`` entries (a run of pushed samples
    that only moved the charge, logged as one entry naming its raw lines: see
    ``acquire/engine/inputs.py``). The tables do not change; the version does, so that a
    chargebook that knows only one entry per sample refuses the file in words ("open it with
    the newer chargebook") instead of verifying it and then failing to replay it."""


#: Every migration ever shipped, oldest first. Never edit or reorder one: append a new one.
MIGRATIONS: tuple[Migration, ...] = (
    Migration("create_core_tables", _create_core_tables),
    Migration("index_rows_by_session", _index_rows_by_session),
    Migration("chain_appended_rows", _chain_appended_rows),
    Migration("station_identity", _station_identity),
    Migration("registers", _registers),
    Migration("browse_views", _browse_views),
    Migration("input_log", _input_log),
    Migration("visits", _visits),
    Migration("session_results", _session_results),
    Migration("input_log_sample_runs", _input_log_sample_runs),
)

SCHEMA_VERSION = len(MIGRATIONS)


def schema_version(db: Database | sqlite3.Connection) -> int:
    """Return the schema version of ``db`` (``PRAGMA user_version``; 0 for a new file)."""
    return int(db.execute("PRAGMA user_version").fetchone()[0])


def migrate(db: Database, upto: int = SCHEMA_VERSION) -> list[str]:
    """Apply the pending migrations up to version ``upto``; return the names applied, in order.

    Each migration, its row in ``migrations`` and the new ``user_version`` commit together.
    Raises :class:`SchemaTooNew` for a database newer than this chargebook.
    """
    if not 0 <= upto <= SCHEMA_VERSION:
        raise ValueError(f"upto must be between 0 and {SCHEMA_VERSION}, got {upto}")
    current = schema_version(db)
    if current > SCHEMA_VERSION:
        raise SchemaTooNew(
            f"the database has schema version {current}, but this chargebook knows versions up "
            f"to {SCHEMA_VERSION}: open it with the newer chargebook that wrote it"
        )
    applied: list[str] = []
    for version, migration in enumerate(MIGRATIONS[current:upto], start=current + 1):
        with db.atomic():
            db.execute(
                "CREATE TABLE IF NOT EXISTS migrations ("
                "version INTEGER PRIMARY KEY, name TEXT NOT NULL UNIQUE, applied_at TEXT NOT NULL)"
            )
            migration.apply(db)
            db.execute(
                "INSERT INTO migrations (version, name, applied_at) VALUES (?, ?, ?)",
                (version, migration.name, datetime.now(UTC).isoformat(timespec="microseconds")),
            )
            db.execute(f"PRAGMA user_version = {version}")
        applied.append(migration.name)
    return applied
