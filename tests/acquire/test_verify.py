"""The record's integrity: REPLACE refused, status changes audited, the hash chain and `verify`.

Tampering is done the way a local user would: a second, plain ``sqlite3`` connection on the real
station file (dropping the triggers first where a tamperer would have to). The recorded session
is the invented example worksheet (Example Clinic (fictional)), recorded through the Store API.
"""

from __future__ import annotations

import hashlib
import json
import sqlite3
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK
from chargebook.acquire.record import chain
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.migrations import migrate
from chargebook.acquire.record.store import Store
from chargebook.acquire.record.verify import verify_all, verify_session
from recorded_session import recorded_station
from sqlite_utils import Database

APPEND_ONLY = ("readings", "environment", "events", "traffic")


@pytest.fixture
def station(tmp_path: Path) -> Path:
    return recorded_station(tmp_path)


def _tamper(path: Path, *statements: str) -> None:
    """Run ``statements`` on a plain sqlite3 connection, as another program would."""
    conn = sqlite3.connect(path)
    with conn:
        for statement in statements:
            conn.execute(statement)
    conn.close()


def _problems(path: Path, session_id: int | None = 1) -> list[tuple[str, int | None, str]]:
    with Store.open(path, read_only=True) as store:
        report = verify_session(store, session_id)
    return [(p.table, p.row_id, p.problem) for p in report.problems]


def test_a_recorded_station_verifies(station: Path) -> None:
    with Store.open(station, read_only=True) as store:
        reports = verify_all(store)
        rows = sum(
            store.db.execute(f"SELECT count(*) FROM {t} WHERE session_id = 1").fetchone()[0]
            for t in (*APPEND_ONLY, "reading_sets")
        )
    assert all(report.verified for report in reports)
    assert reports[0].rows == rows + 1 and rows > 20  # and the session's own row


def test_the_chain_is_sha256_of_the_previous_hash_and_the_row(station: Path) -> None:
    # Recomputed here with hashlib directly, not with the chain module: the documented recipe.
    conn = sqlite3.connect(station)
    first = conn.execute(
        "SELECT id, created_at, metadata_json, plan_json, convention, beam, replay_of, "
        "chain_hash FROM sessions WHERE id = 1 AND chain_seq = 1"
    ).fetchone()
    second = conn.execute(
        "SELECT id, session_id, recorded_at, actor, kind, detail_json, account, chain_hash "
        "FROM events WHERE session_id = 1 AND chain_seq = 2"
    ).fetchone()
    conn.close()
    canonical = json.dumps(["sessions", *first[:7]], ensure_ascii=False, separators=(",", ":"))
    expected = hashlib.sha256(f"{'0' * 64}:1:{canonical}".encode()).hexdigest()
    assert first[7] == expected
    canonical = json.dumps(["events", *second[:7]], ensure_ascii=False, separators=(",", ":"))
    assert second[7] == hashlib.sha256(f"{expected}:2:{canonical}".encode()).hexdigest()


@pytest.mark.parametrize("table", (*APPEND_ONLY, "sessions", "reading_sets"))
def test_insert_or_replace_is_refused_on_every_append_only_table(station: Path, table: str) -> None:
    conn = sqlite3.connect(station)
    columns = [row[1] for row in conn.execute(f"PRAGMA table_info({table})")]
    before = conn.execute(f"SELECT * FROM {table} WHERE id = 1").fetchone()
    marks = ", ".join("?" for _ in columns)
    with pytest.raises(sqlite3.IntegrityError, match="cannot be replaced"):
        conn.execute(f"INSERT OR REPLACE INTO {table} VALUES ({marks})", before)
    with pytest.raises(sqlite3.IntegrityError, match="cannot be replaced"):
        conn.execute(f"REPLACE INTO {table} VALUES ({marks})", before)
    assert conn.execute(f"SELECT * FROM {table} WHERE id = 1").fetchone() == before
    conn.close()


def test_a_row_appended_by_another_program_without_its_chain_is_refused(station: Path) -> None:
    conn = sqlite3.connect(station)
    with pytest.raises(sqlite3.IntegrityError, match="chain_seq and chain_hash"):
        conn.execute(
            "INSERT INTO events (session_id, recorded_at, actor, kind, detail_json) "
            "VALUES (1, '2026-01-01T00:00:00+00:00', 'someone', 'note', '{}')"
        )
    conn.close()


def test_a_plain_update_of_a_set_status_or_a_session_close_time_is_refused(
    station: Path,
) -> None:
    conn = sqlite3.connect(station)
    with pytest.raises(sqlite3.IntegrityError, match="must follow its set_status event"):
        conn.execute("UPDATE reading_sets SET reason = 'nothing wrong' WHERE id = 3")
    with pytest.raises(sqlite3.IntegrityError, match="must follow its session_status event"):
        conn.execute("UPDATE sessions SET closed_at = '2020-01-01T00:00:00+00:00' WHERE id = 1")
    conn.close()


def test_a_changed_reading_is_named_by_table_and_row(station: Path) -> None:
    _tamper(
        station,
        "DROP TRIGGER readings_refuse_update",
        "UPDATE readings SET charge_nC = charge_nC * 1.024 WHERE id = 5",
    )
    (problem,) = _problems(station)
    assert problem[:2] == ("readings", 5) and "changed after it was written" in problem[2]


def test_a_changed_calibration_or_bias_is_named_though_those_tables_are_not_append_only(
    station: Path,
) -> None:
    # A session's metadata (N_D,w, k_Q ...) and a set's bias change the dose as surely as a
    # reading; their status may change, their facts may not.
    _tamper(
        station,
        "DROP TRIGGER sessions_refuse_fact_change",
        "DROP TRIGGER reading_sets_refuse_fact_change",
        "UPDATE sessions SET metadata_json = replace(metadata_json, '\"operator\"', "
        "'\"operator_was\"') WHERE id = 1",
        "UPDATE reading_sets SET bias_V = bias_V / 2 WHERE id = 4",
    )
    problems = _problems(station)
    assert [(table, row_id) for table, row_id, _ in problems] == [
        ("sessions", 1),
        ("reading_sets", 4),
    ]
    assert all("changed after it was written" in text for _, _, text in problems)


def test_a_deleted_event_and_deleted_last_rows_are_named(station: Path) -> None:
    conn = sqlite3.connect(station)
    (last,) = conn.execute("SELECT max(chain_seq) FROM events WHERE session_id = 1").fetchone()
    conn.close()
    _tamper(
        station,
        "DROP TRIGGER events_refuse_delete",
        "DELETE FROM events WHERE session_id = 1 AND chain_seq = 2",
        f"DELETE FROM events WHERE session_id = 1 AND chain_seq = {last}",
    )
    problems = _problems(station)
    assert any("place 2 before it are missing" in p[2] for p in problems)
    assert any(p[0] == "chain_heads" and "last rows were deleted" in p[2] for p in problems)


def test_a_status_changed_with_the_triggers_dropped_is_shown(station: Path) -> None:
    _tamper(
        station,
        "DROP TRIGGER reading_sets_refuse_unaudited",
        "UPDATE reading_sets SET reason = 'nothing wrong' WHERE id = 3",
    )
    (problem,) = _problems(station)
    assert problem[:2] == ("reading_sets", 3)
    assert "reason is 'nothing wrong'" in problem[2]


def test_verify_command_exit_statuses_and_json(station: Path, capsys) -> None:
    assert main(["verify", "--db", str(station)]) == EXIT_OK
    assert "the record verifies" in capsys.readouterr().out
    assert main(["verify", "9", "--db", str(station)]) == EXIT_INVALID_INPUT
    assert main(["verify", "--db", str(station.with_name("none.sqlite"))]) == EXIT_INVALID_INPUT
    capsys.readouterr()
    _tamper(
        station,
        "DROP TRIGGER environment_refuse_update",
        "UPDATE environment SET pressure_kPa = 103.0 WHERE id = 2",
    )
    assert main(["verify", "1", "--db", str(station), "--json"]) == EXIT_FAILURE
    data = json.loads(capsys.readouterr().out)
    assert data["verified"] is False
    (problem,) = data["chains"][0]["problems"]
    assert (problem["table"], problem["row_id"]) == ("environment", 2)


def test_show_and_export_say_at_the_top_that_a_changed_record_does_not_verify(
    station: Path, capsys
) -> None:
    assert main(["show", "1", "--db", str(station)]) == EXIT_OK
    assert "DOES NOT VERIFY" not in capsys.readouterr().out
    _tamper(
        station,
        "DROP TRIGGER readings_refuse_update",
        "UPDATE readings SET charge_nC = charge_nC * 1.024 WHERE id = 5",
    )
    assert main(["show", "1", "--db", str(station)]) == EXIT_OK
    out = capsys.readouterr().out
    assert out.startswith("WARNING: THIS RECORD DOES NOT VERIFY") and "readings row 5" in out
    assert main(["export", "1", "--format", "json", "--db", str(station)]) == EXIT_OK
    captured = capsys.readouterr()
    assert json.loads(captured.out)["integrity"]["verified"] is False
    assert "DOES NOT VERIFY" in captured.err
    assert main(["export", "1", "--format", "html", "--db", str(station)]) == EXIT_OK
    html = capsys.readouterr().out
    assert 'data-key="integrity"' in html
    assert html.index('data-key="integrity"') < html.index("<table")


def test_an_old_file_is_chained_in_stamp_order_by_the_migration_and_verifies(
    tmp_path: Path,
) -> None:
    path = tmp_path / "old.sqlite"
    db = Database(sqlite3.connect(path))
    migrate(db, upto=2)  # the schema before the chain
    db.execute(
        "INSERT INTO sessions (id, created_at, status, metadata_json, plan_json, convention, "
        "beam) VALUES (1, '2025-01-01T08:00:00.000000+00:00', 'open', '{}', '{}', 'trs398', '6 MV')"
    )
    db.execute(  # written late (a burst) but stamped before the event
        "INSERT INTO traffic (id, session_id, t_s, recorded_at, direction, line) "
        "VALUES (1, 1, 1.0, '2025-01-01T08:00:02.000000+00:00', 'rx', x'31')"
    )
    db.execute(
        "INSERT INTO events (id, session_id, recorded_at, actor, kind, detail_json) VALUES "
        "(1, 1, '2025-01-01T08:00:01.000000+00:00', 'daemon', 'session_created', '{}'), "
        "(2, 1, '2025-01-01T08:00:03.000000+00:00', 'operator A', 'note', '{}')"
    )
    db.conn.commit()
    db.close()
    with Store.open(path) as store:
        order = store.db.execute(
            "SELECT 'events', id, chain_seq FROM events UNION ALL "
            "SELECT 'traffic', id, chain_seq FROM traffic ORDER BY 3"
        ).fetchall()
        assert order == [("events", 1, 2), ("traffic", 1, 3), ("events", 2, 4)]  # session: 1
        assert verify_session(store, 1).verified
        store.add_event(1, "operator A", EventKind.NOTE, {"text": "after the migration"})
        report = verify_session(store, 1)
    assert report.verified and report.rows == 5


def test_a_line_kept_before_an_event_comes_before_it_in_the_chain(tmp_path: Path) -> None:
    # The daemon keeps raw lines and commits them a burst at a time; an operator's action
    # written meanwhile must still come after the lines that were received before it.
    with Store.open(tmp_path / "station.sqlite") as store:
        session_id = store.create_session({}, {}, "trs398", "6 MV")
        store.keep_traffic((session_id, 1.0, store.stamp(), "rx", b"20.1\n"))
        event_id = store.add_event(session_id, "operator A", EventKind.NOTE, {"text": "checked"})
        store.keep_traffic((session_id, 2.0, store.stamp(), "rx", b"20.2\n"))
        assert store.commit_traffic() == 1
        rows = store.db.execute(
            "SELECT 'traffic', t_s, chain_seq FROM traffic UNION ALL "
            "SELECT 'events', id, chain_seq FROM events WHERE id = ? ORDER BY 3",
            (event_id,),
        ).fetchall()
        assert rows == [("traffic", 1.0, 3), ("events", event_id, 4), ("traffic", 2.0, 5)]
        assert verify_session(store, session_id).verified


def test_chain_canonical_bytes_treat_a_whole_number_real_as_a_float() -> None:
    assert chain.canonical("traffic", (1, 1, 1, "x", "rx", b"1")) == chain.canonical(
        "traffic", (1, 1, 1.0, "x", "rx", b"1")
    )


@pytest.mark.parametrize(
    "values",
    [
        (12345, 3, 1234.567891, "2026-12-03T06:11:37.123456+00:00", "rx", b"+1.2E-08\r\n"),
        (1, None, 1.0, "2026-12-03T06:11:37.123456+00:00", "tx", b""),
        (2, 7, 1e-300, "\u00e9", "rx", b"\x00\xff"),
        (3, 7, 5e22, 'a"b', "rx", b"x"),
        (4, 7, -0.0, "a\\b", "rx", b"x"),
        (5, 7, 0.1, "a\x1bb", "rx", b"x"),
    ],
)
def test_the_fast_traffic_link_hashes_the_same_bytes_as_the_general_one(values: tuple) -> None:
    assert chain.link_traffic("f" * 64, 9, values) == chain.link("f" * 64, 9, "traffic", values)


def test_verify_says_a_damaged_file_does_not_verify(station: Path, capsys) -> None:
    with station.open("r+b") as file:  # scribble over the second page, a table's b-tree
        file.seek(4096 + 8)
        file.write(b"\x07" * 3000)
    assert main(["verify", "--db", str(station)]) == EXIT_FAILURE
    out = capsys.readouterr().out
    assert "the file is damaged" in out and "THE RECORD DOES NOT VERIFY" in out


def test_kept_lines_survive_a_transaction_that_fails_and_go_with_the_next(tmp_path: Path) -> None:
    with Store.open(tmp_path / "station.sqlite") as store:
        session_id = store.create_session({}, {}, "trs398", "6 MV")
        store.keep_traffic((session_id, 1.0, store.stamp(), "rx", b"20.1\n"))
        with pytest.raises(KeyError):  # NotFound, after the kept line was written: rolled back
            store.add_event(999, "operator A", EventKind.NOTE, {"text": "checked"})
        assert store.traffic_count(session_id) == 0
        store.add_event(session_id, "operator A", EventKind.NOTE, {"text": "checked"})
        assert [row.line for row in store.traffic(session_id)] == [b"20.1\n"]
        assert store.commit_traffic() == 0
        assert verify_session(store, session_id).verified


@pytest.mark.parametrize("session_id", [None, 7])
def test_a_run_of_traffic_rows_links_as_each_row_does_alone(session_id: int | None) -> None:
    stamp = "2026-12-03T06:11:37.123456+00:00"
    lines = [
        (session_id, 1.5, stamp, "rx", b"S t=0.100 q=+1.000000E-09 C OK\n"),
        (session_id, 1.5, stamp, "rx", b""),
        (session_id, 2.0, 'a"b', "tx", b"GO\n"),  # text JSON must escape: the general path
        (session_id, 2.25, stamp, "rx", b"\x00\xff"),
    ]
    shared = (session_id, 3.0, stamp, "rx")  # the same objects in each line of a burst
    burst = [(*shared, b"1\n"), (*shared, b"2\n")]
    lines += [*burst, (session_id, 3.5, stamp, "rx", bytearray(b"3\n")), *burst]
    rows = chain.traffic_rows("f" * 64, 9, 100, lines)
    previous = "f" * 64
    for seq, (row, line) in enumerate(zip(rows, lines, strict=True), start=10):
        values = (row[0], *line)
        previous = chain.link(previous, seq, "traffic", values)  # the general canonical bytes
        assert row == (*values, seq, previous)
    assert [row[0] for row in rows] == list(range(100, 109))
    assert chain.traffic_rows("f" * 64, 9, 100, []) == []


def _burst_station(path: Path) -> tuple[Path, int]:
    """Return a station file with a session whose raw lines were kept a burst at a time."""
    with Store.open(path) as store:
        session_id = store.create_session({}, {}, "trs398", "6 MV")
        ids: list[int | None] = []
        for burst in range(3):
            lines = [f"S t={burst}.{n:03d} q=+1.000000E-09 C OK\n".encode() for n in range(50)]
            store.keep_traffic_burst(
                session_id, float(burst), store.stamp(), "rx", lines, ids.append
            )
            store.keep_traffic((None, float(burst), store.stamp(), "tx", b"GO\n"))
        store.commit_traffic()
        store.add_event(session_id, "operator A", EventKind.NOTE, {"text": "checked"})
        assert store.traffic_count(session_id) == 150 and store.traffic_count(None) == 3
        rows = store.traffic(session_id)
        # each burst's listener is told the row id of its first line; the others follow it
        assert ids == [rows[0].id, rows[50].id, rows[100].id]
        assert rows[51].line == b"S t=1.001 q=+1.000000E-09 C OK\n" and rows[51].t_s == 1.0
        assert verify_session(store, session_id).verified
        assert verify_session(store, None).verified
    return path, session_id


@pytest.mark.parametrize(
    ("statements", "said"),
    [
        (
            ["DROP TRIGGER traffic_refuse_update", "UPDATE traffic SET line = x'00' WHERE id = 60"],
            "changed",
        ),
        (["DROP TRIGGER traffic_refuse_delete", "DELETE FROM traffic WHERE id = 60"], "missing"),
        (
            [  # a line slipped in, with the place and hash of one already there
                "INSERT INTO traffic (id, session_id, t_s, recorded_at, direction, line, "
                "chain_seq, chain_hash) SELECT 1000, session_id, t_s, recorded_at, direction, "
                "x'00', chain_seq, chain_hash FROM traffic WHERE id = 60",
            ],
            "",
        ),
    ],
)
def test_lines_kept_a_burst_at_a_time_show_an_edit_a_deletion_or_an_insertion(
    tmp_path: Path, statements: list[str], said: str
) -> None:
    path, session_id = _burst_station(tmp_path / "station.sqlite")
    _tamper(path, *statements)
    problems = _problems(path, session_id)
    assert problems and any(p[0] == "traffic" for p in problems)
    assert all(said in p[2] for p in problems if p[0] == "traffic")


@pytest.mark.parametrize(
    "values",
    [
        (7, 3, "2026-12-03T06:11:37.123456+00:00", "sample", "daemon", '{"t_s": 1.5}', None),
        (8, None, "x", "note", "operator Ä", '{"text": "a \\"quoted\\" \\\\ é\\u001b"}', "u"),
        (9, 3, "x", "k\n", "a\x00b", "{}", "account\ttab"),
        (10, True, "x", "k", "a", "{}", None),  # not an id: the general path
    ],
)
def test_the_fast_input_link_hashes_the_same_bytes_as_the_general_one(values: tuple) -> None:
    assert chain.link_input("e" * 64, 4, values) == chain.link("e" * 64, 4, "inputs", values)


@pytest.mark.parametrize(
    ("table", "values"),
    [
        ("events", (7, 3, "2026-12-03T06:11:37+00:00", "operator Ä", "note", '{"t": "é"}', None)),
        ("events", (8, None, "x", "a\x00b\u2028", "k\n", "{}", "account\ttab")),
        ("readings", (3, 1, 2, 4, 1.5, -12.345678, "auto", 0, "ok", None, "t")),
        ("readings", (3, 1, 2, 4, 1, -12, "auto", 1, "ok", 7, "t")),  # whole REALs: floats
        ("environment", (1, 1, "t", 20, 101.325, 760.0, "mmHg", None, "typed")),
        ("sessions", (1, "t", '{"beam": "6 MV"}', "{}", "trs398", "6 MV", None)),
        ("reading_sets", (1, 1, 0, "ref", "routine", -1, -300.0, 1, "t")),
    ],
)
def test_the_plain_link_hashes_the_same_bytes_as_the_general_one(table: str, values: tuple) -> None:
    assert chain.plain_link("e" * 64, 4, table, values) == chain.link("e" * 64, 4, table, values)


@pytest.mark.parametrize(
    ("table", "values"),
    [
        ("readings", (3, 1, 2, 4, float("nan"), 1.0, "auto", 0, "ok", None, "t")),
        ("events", (7, True, "x", "a", "k", "{}", None)),  # a yes/no is not an id
        ("traffic", (1, 1, 1.0, "t", "in", b"S\n")),  # bytes: hashed as hex by the general path
    ],
)
def test_a_row_the_plain_link_cannot_write_is_left_to_the_general_one(
    table: str, values: tuple
) -> None:
    assert chain.plain_link("e" * 64, 4, table, values) is None
