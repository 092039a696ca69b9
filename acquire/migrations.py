"""The station database schema, as a list of named forward migrations.

The schema version is ``PRAGMA user_version``: the number of migrations applied. Each migration
runs inside one transaction together with its record in the ``migrations`` table and the new
``user_version``, so a database is always at exactly one version: a migration that fails leaves
the previous version untouched.

Migrations only ever move forward. A database written by a newer chargebook (a version above the
ones known here) is refused rather than guessed at.

Append-only tables (readings, environment, events, traffic) carry ``BEFORE UPDATE`` and
``BEFORE DELETE`` triggers that abort the statement. Sessions and reading sets may change their
status (the store records each change as an event) but never their recorded facts, and are never
deleted.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime

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


class SchemaTooNew(RuntimeError):
    """The database was written by a newer chargebook whose schema this one does not know."""


@dataclass(frozen=True, slots=True)
class Migration:
    """One forward step of the schema: ``apply`` runs inside the migration's transaction."""

    name: str
    apply: Callable[[Database], None]


def _sql_list(values: tuple[str, ...]) -> str:
    return ", ".join(f"'{value}'" for value in values)


def _append_only_triggers(table: str) -> str:
    return f"""
    CREATE TRIGGER {table}_refuse_update BEFORE UPDATE ON {table}
    BEGIN
        SELECT RAISE(ABORT, '{table} is append-only: a recorded row cannot be changed');
    END;
    CREATE TRIGGER {table}_refuse_delete BEFORE DELETE ON {table}
    BEGIN
        SELECT RAISE(ABORT, '{table} is append-only: a recorded row cannot be deleted');
    END;
    """


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


#: Every migration ever shipped, oldest first. Never edit or reorder one: append a new one.
MIGRATIONS: tuple[Migration, ...] = (
    Migration("create_core_tables", _create_core_tables),
    Migration("index_rows_by_session", _index_rows_by_session),
)

SCHEMA_VERSION = len(MIGRATIONS)


def schema_version(db: Database) -> int:
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
