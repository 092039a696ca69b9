"""`chargebook sessions`, and what every read-side command shares (--db, read-only, errors).

The station is a real SQLite file holding the invented example worksheet (Example Clinic
(fictional)) recorded through the Store API.
"""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import Store
from recorded_session import record_example_session


@pytest.fixture
def station(tmp_path: Path) -> Path:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        record_example_session(store)
        record_example_session(store, status="open", treatment_machine="DEMO-LA2")
        record_example_session(store, beam="10 MV", k_Q=0.98)
    return path


def test_lists_every_session_as_a_table(station: Path, capsys) -> None:
    assert main(["sessions", "--db", str(station)]) == EXIT_OK
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].split()[:3] == ["id", "started", "status"]
    body = [line.split() for line in lines[2:]]
    assert [row[0] for row in body] == ["1", "2", "3"]
    assert [row[4] for row in body] == ["finished", "open", "finished"]
    assert "4/5 accepted" in lines[2] and "DEMO-LA2" in lines[3]


def test_json_and_filters(station: Path, capsys) -> None:
    assert main(["sessions", "--db", str(station), "--json", "--status", "finished"]) == EXIT_OK
    rows = json.loads(capsys.readouterr().out)
    assert [(r["id"], r["beam"]) for r in rows] == [(1, "6 MV"), (3, "10 MV")]
    with Store.open(station, read_only=True) as store:
        assert rows[0]["readings"] == len(store.readings(1))
        assert rows[0]["sets"] == len(store.sets(1))
    assert main(["sessions", "--db", str(station), "--json", "--beam", "6 mv"]) == EXIT_OK
    assert [r["id"] for r in json.loads(capsys.readouterr().out)] == [1, 2]
    assert main(["sessions", "--db", str(station), "--json", "--machine", "DEMO-LA2"]) == EXIT_OK
    assert [r["id"] for r in json.loads(capsys.readouterr().out)] == [2]


def test_a_session_whose_names_are_not_all_text_is_listed_from_its_decoded_metadata(
    tmp_path: Path, capsys
) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:  # an operator kept as a number: read by decoding the row
        store.create_session(
            {"treatment_machine": "DEMO-LA3", "beam": "6 MV", "operator": 7},
            {"steps": []},
            "TRS-398",
            "6 MV",
        )
        store.create_session(
            {"treatment_machine": "DEMO-LA4", "beam": "6 MV"}, {"steps": []}, "TRS-398", "6 MV"
        )
    assert main(["sessions", "--db", str(path), "--json", "--machine", "demo-la3"]) == EXIT_OK
    (row,) = json.loads(capsys.readouterr().out)
    assert (row["id"], row["treatment_machine"], row["operator"]) == (1, "DEMO-LA3", 7)


def test_default_database_follows_xdg_data_home(tmp_path: Path, monkeypatch, capsys) -> None:
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path))
    with Store.open(tmp_path / "chargebook" / "station.sqlite") as store:
        record_example_session(store)
    assert main(["sessions", "--json"]) == EXIT_OK
    assert [r["id"] for r in json.loads(capsys.readouterr().out)] == [1]


def test_a_missing_database_is_named_and_not_created(tmp_path: Path, capsys) -> None:
    missing = tmp_path / "nowhere.sqlite"
    # A file the user named that does not exist is unusable input: 2, as `correct` gives for a
    # missing worksheet and `show` for a missing session.
    reads = (["sessions"], ["show", "1"], ["export", "1"], ["history", "--beam", "6 MV"])
    for argv in (*reads, ["replay", "1"], ["verify", "1"]):
        assert main([*argv, "--db", str(missing)]) == EXIT_INVALID_INPUT, argv
        assert f"no station database at {missing}" in capsys.readouterr().err
    assert not missing.exists()


def test_a_missing_station_database_points_to_the_demo_database(
    tmp_path: Path, monkeypatch, capsys
) -> None:
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path))
    with Store.open(tmp_path / "chargebook" / "demo.sqlite") as store:
        record_example_session(store)
    assert main(["sessions"]) == EXIT_INVALID_INPUT
    err = capsys.readouterr().err
    assert f"no station database at {tmp_path / 'chargebook' / 'station.sqlite'}" in err
    assert f"--db {tmp_path / 'chargebook' / 'demo.sqlite'}" in err


def test_reading_while_the_daemon_writes_changes_nothing(station: Path, capsys) -> None:
    with Store.open(station) as writer:
        writer.add_event(2, "daemon", EventKind.NOTE, {"text": "still measuring"})
        before = [len(writer.events(i)) for i in (1, 2, 3)]
        assert main(["sessions", "--db", str(station), "--json"]) == EXIT_OK
        assert main(["show", "2", "--db", str(station)]) == EXIT_OK
        assert [len(writer.events(i)) for i in (1, 2, 3)] == before
        routine_set = writer.sets(2)[1].id
        reading_id = writer.add_reading(2, routine_set, 9, 1.0, 14.7, "auto", False, "ok")
    capsys.readouterr()
    assert main(["sessions", "--db", str(station), "--json"]) == EXIT_OK
    rows = json.loads(capsys.readouterr().out)
    assert reading_id and rows[1]["readings"] == 16


def test_read_side_commands_import_nothing_heavy() -> None:
    code = (
        "import sys\n"
        "from chargebook.acquire.commands import sessions, show, export, history\n"
        "heavy = [m for m in ('numpy', 'sqlite_utils', 'textual') if m in sys.modules]\n"
        "print(','.join(heavy))\n"
    )
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=60
    )
    assert result.stdout.strip() == ""


@pytest.mark.parametrize("command", ["sessions", "show"])
def test_a_damaged_station_file_is_refused_in_words_not_a_traceback(
    station: Path, command: str, capsys
) -> None:
    data = bytearray(station.read_bytes())
    for offset in range(2 * 4096, len(data), 7):  # scribble over every page after the schema
        data[offset] = 0x5A
    station.write_bytes(data)
    args = [command, "1"] if command == "show" else [command]
    assert main([*args, "--db", str(station)]) == EXIT_FAILURE
    err = capsys.readouterr().err
    assert "cannot be read" in err and str(station) in err
    assert "Traceback" not in err


def test_a_session_measuring_a_beam_of_a_visit_shows_the_visit_and_the_beam(
    station: Path, capsys
) -> None:
    from chargebook.acquire.record import visits

    with Store.open(station) as store:
        visit_id = visits.create_visit(store, "DEMO-LA1", {"operator": "operator A"}, "operator A")
        _six, ten = (
            visits.add_beam(store, visit_id, beam, "default", {"beam": beam}, "operator A")
            for beam in ("6 MV", "10 MV")
        )
        ten_session = record_example_session(store, status="open", beam="10 MV")
        visits.link_session(store, visit_id, ten, ten_session, "operator A")
    assert main(["sessions", "--db", str(station)]) == EXIT_OK
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].split()[-1] == "visit"
    rows = {line.split()[0]: line for line in lines[2:]}
    assert rows[str(ten_session)].endswith(f"{visit_id}, beam 2")  # the second beam of visit 1
    assert all(not rows[str(i)].endswith("beam 2") for i in (1, 2, 3))  # of no visit
    assert main(["sessions", "--db", str(station), "--json"]) == EXIT_OK
    found = {r["id"]: (r["visit_id"], r["visit_beam"]) for r in json.loads(capsys.readouterr().out)}
    assert found == {1: (None, None), 2: (None, None), 3: (None, None), 4: (visit_id, 2)}


def test_a_station_without_visits_lists_no_visit_column(station: Path, capsys) -> None:
    assert main(["sessions", "--db", str(station)]) == EXIT_OK
    header = capsys.readouterr().out.splitlines()[0]
    assert header.split()[-2:] == ["replay", "of"]


def test_a_session_whose_metadata_is_not_json_is_listed_without_names_and_said(
    tmp_path: Path, capsys
) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        for machine in ("DEMO-LA3", "DEMO-LA4"):
            meta = {"treatment_machine": machine, "beam": "6 MV"}
            store.create_session(meta, {"steps": []}, "TRS-398", "6 MV")
    with sqlite3.connect(path) as db:  # damaged by hand, its guard dropped: not JSON at all
        db.execute("DROP TRIGGER sessions_refuse_fact_change")
        db.execute("UPDATE sessions SET metadata_json = '{not json' WHERE id = 1")
    assert main(["sessions", "--db", str(path), "--json"]) == EXIT_OK
    captured = capsys.readouterr()
    rows = json.loads(captured.out)
    assert [(r["id"], r["treatment_machine"]) for r in rows] == [(1, None), (2, "DEMO-LA4")]
    assert "session 1: its stored metadata is not a JSON object" in captured.err
