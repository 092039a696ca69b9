"""Station identity and global session ids (issue 16 item 2): migration ``station_identity``.

Real SQLite files. The old file (schema 3) is built as test_verify builds one: plain inserts at
schema 2, then the chain migration, then closed, as a file written by the previous chargebook.
"""

from __future__ import annotations

import csv
import io
import json
import socket
import sqlite3
import uuid
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.exit_codes import EXIT_OK
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.migrations import MIGRATIONS, migrate, session_uuid_at_migration
from chargebook.acquire.record.store import Store
from chargebook.acquire.record.verify import verify_all, verify_session
from recorded_session import record_example_session
from sqlite_utils import Database


def _schema_3_file(path: Path) -> Path:
    """Return a station file as the previous chargebook left it: two sessions, chained."""
    db = Database(sqlite3.connect(path))
    migrate(db, upto=2)
    for session_id in (1, 2):
        stamp = f"2025-01-0{session_id}T08:00:00.000000+00:00"
        db.execute(
            "INSERT INTO sessions (id, created_at, status, metadata_json, plan_json, convention, "
            "beam) VALUES (?, ?, 'open', '{}', '{}', 'trs398', '6 MV')",
            (session_id, stamp),
        )
        db.execute(
            "INSERT INTO events (session_id, recorded_at, actor, kind, detail_json) "
            "VALUES (?, ?, 'daemon', 'session_created', '{}')",
            (session_id, stamp),
        )
    db.conn.commit()
    assert [m.name for m in MIGRATIONS[:3]][-1] == "chain_appended_rows"
    migrate(db, upto=3)
    db.close()
    return path


def test_two_station_files_have_different_station_uuids(tmp_path: Path) -> None:
    with Store.open(tmp_path / "a.sqlite") as a, Store.open(tmp_path / "b.sqlite") as b:
        first, second = a.station(), b.station()
    assert first.uuid != second.uuid
    assert uuid.UUID(first.uuid).version == 4
    assert first.name == socket.gethostname()  # the default name: the host's


def test_session_uuids_are_unique_and_stable_across_reopen(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        ids = [record_example_session(store) for _ in range(3)]
        uuids = [store.session(n).uuid for n in ids]
        station = store.station()
    assert len(set(uuids)) == 3 and all(uuid.UUID(u).version == 4 for u in uuids)
    with Store.open(path) as store:
        assert [store.session(n).uuid for n in ids] == uuids
        assert store.station() == station
        created = [store.events(n)[0] for n in ids]
    assert [event.detail()["uuid"] for event in created] == uuids  # under the hash chain


def test_an_old_file_gets_ids_at_migration_and_still_verifies(tmp_path: Path) -> None:
    path = _schema_3_file(tmp_path / "old.sqlite")
    with Store.open(path) as store:
        assert store.schema_version == len(MIGRATIONS)
        station = store.station().uuid
        found = {n: store.session(n).uuid for n in (1, 2)}
        assert all(report.verified for report in verify_all(store))
        applied = store.db.execute("SELECT name FROM migrations ORDER BY version").fetchall()
    # uuid5 of the session in the station's namespace: the same whenever it is computed again
    assert found == {n: str(uuid.uuid5(uuid.UUID(station), f"session {n}")) for n in (1, 2)}
    assert found == {n: session_uuid_at_migration(station, n) for n in (1, 2)}
    assert ("station_identity",) in applied  # later migrations may follow it
    with Store.open(path) as store:
        assert {n: store.session(n).uuid for n in (1, 2)} == found


def test_a_uuid_cannot_be_changed_and_a_changed_one_does_not_verify(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        record_example_session(store)
    conn = sqlite3.connect(path)
    with pytest.raises(sqlite3.IntegrityError, match="uuid of a session cannot change"):
        conn.execute("UPDATE sessions SET uuid = 'x' WHERE id = 1")
    with pytest.raises(sqlite3.IntegrityError, match="identity of a station cannot change"):
        conn.execute("UPDATE station SET uuid = 'x'")
    with conn:  # a tamperer who drops the trigger first
        conn.execute("DROP TRIGGER sessions_refuse_uuid_change")
        conn.execute(f"UPDATE sessions SET uuid = '{uuid.uuid4()}' WHERE id = 1")
    conn.close()
    with Store.open(path, read_only=True) as store:
        problems = verify_session(store, 1).problems
    assert [(p.table, p.row_id) for p in problems] == [("sessions", 1)]
    assert "the chain recorded" in problems[0].problem


def test_a_station_name_is_configured_and_its_change_audited(tmp_path: Path) -> None:
    with Store.open(tmp_path / "station.sqlite") as store:
        first = store.station()
        assert store.name_station("Physics bench 2") is True
        assert store.name_station("Physics bench 2") is False  # same name: nothing recorded
        named = store.station()
        events = store.events(None)
    assert (named.uuid, named.name) == (first.uuid, "Physics bench 2")
    named_events = [(EventKind.STATION_NAMED, "Physics bench 2")]
    assert [(e.kind, e.detail()["to"]) for e in events] == named_events


def test_every_export_carries_the_station_and_session_uuids(tmp_path: Path, capsys) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        record_example_session(store)
        station, session = store.station(), store.session(1)
    db = ["--db", str(path)]
    assert main(["export", "1", "--format", "json", *db]) == EXIT_OK
    data = json.loads(capsys.readouterr().out)
    assert (data["station"]["uuid"], data["session"]["uuid"]) == (station.uuid, session.uuid)
    assert main(["export", "1", "--format", "csv", *db]) == EXIT_OK
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    assert {(r["station_uuid"], r["session_uuid"]) for r in rows} == {(station.uuid, session.uuid)}
    assert main(["export", "1", "--format", "html", *db]) == EXIT_OK
    html = capsys.readouterr().out
    assert session.uuid in html and station.uuid in html
    assert main(["show", "1", *db]) == EXIT_OK
    shown = capsys.readouterr().out
    assert session.uuid in shown and station.uuid in shown
    assert main(["sessions", "--json", *db]) == EXIT_OK
    row = json.loads(capsys.readouterr().out)[0]
    assert (row["uuid"], row["station_uuid"], row["station_name"]) == (
        session.uuid,
        station.uuid,
        station.name,
    )


def test_serve_takes_the_station_name_and_refuses_a_blank_one(tmp_path: Path) -> None:
    from chargebook.acquire.commands.cli import build_parser
    from chargebook.acquire.daemon.main import options_from_args
    from chargebook.corrections.errors import InputError

    serve = [
        "serve",
        "--profile",
        "query-plain",
        "--port",
        "/dev/null",
        "--db",
        str(tmp_path / "s"),
    ]
    args = build_parser().parse_args([*serve, "--station-name", "Physics bench 2"])
    assert options_from_args(args, tmp_path / "d.sock").station_name == "Physics bench 2"
    assert options_from_args(build_parser().parse_args(serve)).station_name is None
    blank = build_parser().parse_args([*serve, "--station-name", "  "])
    with pytest.raises(InputError, match="--station-name"):
        options_from_args(blank)
