"""The department record on a real PostgreSQL server (issue 16 item 4): `chargebook publish`
from three station files into one database, and `sessions`, `show`, `export`, `history` read
back from it as from the station files.

The server is a private cluster from Debian's packages on a Unix socket, no TCP
(``postgres_server``). The sessions are the invented example worksheet (Example Clinic,
fictional) recorded through the Store API at dates set by the test.
"""

from __future__ import annotations

import itertools
import json
import re
import sqlite3
from collections.abc import Iterator
from datetime import UTC, date, datetime
from pathlib import Path

import psycopg
import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.commands.demo_data import add_demo_registers
from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK
from chargebook.acquire.record import department
from chargebook.acquire.record.registers import register_rows
from chargebook.acquire.record.review import record_review
from chargebook.acquire.record.store import Store
from chargebook.acquire.record.verify import verify_session
from chargebook.acquire.session.carried import carried_metadata
from chargebook.acquire.session.register_rows import select
from chargebook.acquire.session.stored_result import stored_row
from postgres_server import Server, running_server
from recorded_session import example_metadata, record_example_session
from test_carried_start import MONTHLY, TODAY, StoreClock, record_output_check

pytestmark = pytest.mark.slow

STATIONS = ("station-a", "station-b", "station-c")
TABLES = ("sessions", "reading_sets", "readings", "environment", "events", "traffic")
_numbers = itertools.count()


@pytest.fixture(scope="module")
def server() -> Iterator[Server]:
    with running_server() as running:
        yield running


@pytest.fixture
def url(server: Server) -> str:
    """An empty database of its own for each test, with the department record's schema."""
    found = server.new_database(f"department_{next(_numbers)}")
    with department.open_department(found, require_record=False) as database:
        department.create_schema(database)
    return found


class Clock(StoreClock):
    """The store's clock: each reading of it a millisecond later than the last, from ``day``."""

    def __init__(self) -> None:
        super().__init__(datetime(2026, 11, 1, 8, 0, tzinfo=UTC))

    def day(self, day: int) -> None:
        self.now = datetime(2026, 11, day, 8, 0, tzinfo=UTC)


def _station_file(folder: Path, index: int, sessions: int = 2) -> Path:
    """Record a station (named station-a, -b or -c) whose sessions start on interleaved days:
    station a on days 1, 4, 7 ..., b on 2, 5, ..., c on 3, 6, ...; the last one reviewed."""
    path = folder / f"{STATIONS[index]}.sqlite"
    clock = Clock()
    with Store.open(path, now=clock) as store:
        store.results_on_close = stored_row  # as the daemon keeps them; the department does not
        store.name_station(STATIONS[index])
        for n in range(sessions):
            clock.day(1 + index + 3 * n)
            record_example_session(store, scale=1.0 + 0.001 * (index + 3 * n))
        record_review(store, sessions, "approve", "reviewer B", "within tolerance")
    return path


@pytest.fixture
def stations(tmp_path: Path) -> list[Path]:
    return [_station_file(tmp_path, index) for index in range(3)]


def _counts(url: str) -> dict[str, int]:
    with psycopg.connect(url) as connection:
        return {
            table: connection.execute(f"SELECT count(*) FROM chargebook.{table}").fetchone()[0]
            for table in (*TABLES, "chain_heads", "stations", "station_names")
        }


def _publish(path: Path, url: str, capsys) -> str:
    assert main(["publish", "--db", str(path), "--to", url]) == EXIT_OK
    return capsys.readouterr().out


def test_three_stations_published_twice_add_nothing_the_second_time(
    stations: list[Path], url: str, capsys
) -> None:
    for path in stations:
        said = _publish(path, url, capsys)
        assert "published 2 session(s) of station" in said and "0 already there" in said
    once = _counts(url)
    for path in stations:
        said = _publish(path, url, capsys)
        assert "published 0 session(s)" in said and "2 already there" in said
    assert _counts(url) == once
    assert once["stations"] == once["station_names"] == 3
    assert once["sessions"] == 6 and once["chain_heads"] == 6
    expected = 0  # every row of every session's chain, and the events outside sessions
    for path in stations:
        with Store.open(path, read_only=True) as store:
            sessions = store.sessions()
            expected += sum(len(store.chained_rows(t, s.id)) for t in TABLES for s in sessions)
            expected += len(store.events(None))
    assert sum(once[table] for table in TABLES) == expected


def _normal(text: str) -> str:
    """Return a command's output with the time it was generated left out."""
    text = re.sub(r'"generated_at": "[^"]*"', '"generated_at": ""', text)
    return re.sub(r"Generated \S+ by", "Generated by", text)


READS = (
    ["sessions"],
    ["sessions", "--json"],
    ["show", "2"],
    ["show", "2", "--json"],
    ["export", "1", "--format", "csv"],
    ["export", "2", "--format", "json", "--traffic"],
    ["export", "2", "--format", "html"],
    ["history", "--beam", "6 MV"],
    ["history", "--beam", "6 MV", "--format", "json", "--baseline", "first"],
)


@pytest.mark.parametrize("command", READS, ids=lambda c: " ".join(c))
def test_reads_from_the_department_are_the_station_files_bit_for_bit(
    stations: list[Path], url: str, command: list[str], capsys
) -> None:
    for path in stations:
        _publish(path, url, capsys)
    for name, path in zip(STATIONS, stations, strict=True):
        with Store.open(path, read_only=True) as store:  # history reads the kept results
            assert len(store.session_results()) == len(store.sessions())
        assert main([*command, "--db", str(path)]) == EXIT_OK
        from_file = capsys.readouterr().out
        assert main([*command, "--db", url, "--station", name]) == EXIT_OK
        from_department = capsys.readouterr().out
        assert from_file.strip()
        assert _normal(from_department) == _normal(from_file)


def test_history_across_stations_is_sorted_by_date(stations: list[Path], url: str, capsys) -> None:
    for path in stations:
        _publish(path, url, capsys)
    assert main(["history", "--beam", "6 MV", "--db", url, "--format", "json"]) == EXIT_OK
    points = json.loads(capsys.readouterr().out)["points"]
    days = [point["created_at"][:10] for point in points]
    assert days == [f"2026-11-0{day}" for day in range(1, 7)]
    assert [p["station"] for p in points] == [*STATIONS, *STATIONS]
    assert [p["session_id"] for p in points] == [1, 1, 1, 2, 2, 2]
    assert [p["review"] for p in points] == ["unreviewed"] * 3 + ["approved"] * 3
    assert main(["history", "--beam", "6 MV", "--db", url, "--no-plot"]) == EXIT_OK
    table = capsys.readouterr().out
    assert table.index("station-a:1") < table.index("station-b:1") < table.index("station-a:2")
    assert main(["sessions", "--db", url]) == EXIT_OK
    listed = capsys.readouterr().out.splitlines()[2:]
    assert [line.split()[:2] for line in listed[:6]] == [
        [name, str(n)] for n in (1, 2) for name in STATIONS
    ]


def _station_with_registers(folder: Path) -> Path:
    """A station whose registers name DEMO-LA1's 6 MV beam (the invented demo registers): two
    typed sessions of it, one of DEMO-LA2, and an output check that named the register beam."""
    path = folder / "registered.sqlite"
    with Store.open(path, now=Clock()) as store:
        store.name_station("station-r")
        ids = add_demo_registers(store, actor="physicist C", today=date(2026, 11, 1))
        record_example_session(store)
        record_example_session(store, treatment_machine="DEMO-LA2")
        record_example_session(store, scale=1.004)
        picked = select(
            store,
            {"beam": ids["la1_6mv"], "chamber": ids["ch1"], "electrometer": ids["em1"]},
            on=date(2026, 11, 1),
        )
        named = example_metadata(registers=picked.ids(), register_copy=picked.copy())
        record_output_check(store, carried_metadata(store, named, MONTHLY, TODAY))
    return path


@pytest.mark.parametrize(
    "command",
    [
        ["history", "--beam", "DEMO-LA1 6 MV"],
        ["history", "--beam", "6mv", "--format", "json"],
        ["history", "--beam", "DEMO-LA1 7 MV"],  # refused alike, naming the closest beam
    ],
)
def test_the_registers_beam_names_its_history_in_the_department_too(
    tmp_path: Path, url: str, command: list[str], capsys
) -> None:
    """The registers reach the department as their published register_row events, so a
    register beam's name finds the same sessions there as in the station file."""
    path = _station_with_registers(tmp_path)
    _publish(path, url, capsys)
    from_file = main([*command, "--db", str(path)]), capsys.readouterr()
    from_department = main([*command, "--db", url]), capsys.readouterr()
    assert from_department[0] == from_file[0]
    assert _normal(from_department[1].out) == _normal(from_file[1].out)
    assert from_department[1].err == from_file[1].err
    if "7 MV" in command[2]:
        assert from_file[0] == EXIT_INVALID_INPUT and "DEMO-LA1 6 MV" in from_file[1].err
    else:
        assert from_file[0] == EXIT_OK and "DEMO-LA2" not in from_file[1].out


def test_a_register_beams_history_across_stations_keeps_the_stations_without_registers(
    tmp_path: Path, url: str, capsys
) -> None:
    """One station's registers name DEMO-LA1's 6 MV beam; another station has no registers
    (its sessions typed DEMO-LA1 and 6 MV) and a third measured only a machine the first one's
    registers do not know. The register beam's name finds the typed sessions too, and a beam
    only the third measured is not refused because the first station's registers lack it."""
    _publish(_station_with_registers(tmp_path), url, capsys)
    _publish(_station_file(tmp_path, 0), url, capsys)  # station-a: no registers
    other = tmp_path / "other.sqlite"
    with Store.open(other, now=Clock()) as store:
        store.name_station("station-o")
        record_example_session(store, treatment_machine="DEMO-LA9")
    _publish(other, url, capsys)
    assert main(["history", "--beam", "DEMO-LA1 6 MV", "--db", url, "--format", "json"]) == 0
    named = json.loads(capsys.readouterr().out)
    command = ["history", "--beam", "6 MV", "--machine", "DEMO-LA1", "--db", url]
    assert main([*command, "--format", "json"]) == EXIT_OK
    typed = json.loads(capsys.readouterr().out)
    stations = {point["station"] for point in named["points"]}
    assert stations == {"station-r", "station-a"}
    assert [p["session_id"] for p in named["points"]] == [p["session_id"] for p in typed["points"]]
    assert main(["history", "--beam", "6 MV", "--machine", "DEMO-LA9", "--db", url]) == EXIT_OK
    assert "station-o:1" in capsys.readouterr().out
    assert main(["history", "--beam", "DEMO-LA7 6 MV", "--db", url]) == EXIT_INVALID_INPUT
    assert "is not a beam of the registers" in capsys.readouterr().err


def test_register_rows_read_from_the_department_are_the_station_files(
    tmp_path: Path, url: str, capsys
) -> None:
    path = _station_with_registers(tmp_path)
    _publish(path, url, capsys)
    with Store.open(path, read_only=True) as store:
        in_file = register_rows(store, include_superseded=True)
    with department.open_department(url) as database:
        (station,) = database.stations()
        in_department = register_rows(database.store(station), include_superseded=True)
    assert in_department == in_file and len(in_file) > 5


def test_show_finds_the_station_of_a_session_or_asks_which(
    tmp_path: Path, url: str, capsys
) -> None:
    first = _station_file(tmp_path, 0, sessions=3)
    second = _station_file(tmp_path, 1, sessions=2)
    _publish(first, url, capsys)
    _publish(second, url, capsys)
    assert main(["show", "3", "--db", url, "--json"]) == EXIT_OK  # only station-a has a third
    assert json.loads(capsys.readouterr().out)["station"]["name"] == "station-a"
    assert main(["show", "2", "--db", url]) == EXIT_INVALID_INPUT
    assert "is recorded at several stations" in capsys.readouterr().err
    with Store.open(second, read_only=True) as store:
        key = store.session(2).uuid  # a session's UUID names it across stations
    for where in (url, str(second)):
        assert main(["export", key.upper(), "--db", where, "--format", "json"]) == EXIT_OK
        exported = json.loads(capsys.readouterr().out)
        assert (exported["station"]["name"], exported["session"]["id"]) == ("station-b", 2)
    assert main(["show", key, "--db", str(first)]) == EXIT_INVALID_INPUT
    assert f"no session with UUID {key}" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        main(["show", "not-a-session", "--db", url])
    assert "neither a session id nor a session UUID" in capsys.readouterr().err
    assert main(["show", "9", "--db", url]) == EXIT_INVALID_INPUT
    assert "no session with id 9" in capsys.readouterr().err
    assert main(["sessions", "--db", url, "--station", "station-z"]) == EXIT_INVALID_INPUT
    err = capsys.readouterr().err
    assert "--station = 'station-z'" in err and "station-a (" in err and "station-b (" in err


def test_a_delete_and_an_update_are_refused_whoever_asks(
    stations: list[Path], url: str, capsys
) -> None:
    with psycopg.connect(url, autocommit=True) as owner:
        owner.execute('CREATE ROLE "station-a" LOGIN IN ROLE chargebook_publisher')
    publisher = url.replace("chargebook_owner@", "station-a@")
    _publish(stations[0], publisher, capsys)  # the publisher role may insert
    for who in (url, publisher):
        with psycopg.connect(who, autocommit=True) as connection:
            for statement in (
                "DELETE FROM chargebook.readings",
                "UPDATE chargebook.sessions SET status = 'open'",
                "TRUNCATE chargebook.events CASCADE",
            ):
                with pytest.raises(psycopg.Error) as refused:
                    connection.execute(statement)
                words = str(refused.value)
                assert "append-only" in words or "permission denied" in words
    with psycopg.connect(url, autocommit=True) as owner:  # the owner: refused by the triggers
        with pytest.raises(psycopg.Error, match="append-only: DELETE refused"):
            owner.execute("DELETE FROM chargebook.readings")
        with pytest.raises(psycopg.Error, match="append-only: UPDATE refused"):
            owner.execute("UPDATE chargebook.sessions SET status = 'open'")
    assert _counts(url)["sessions"] == 2


def test_a_review_given_after_publishing_is_added_by_the_next_publish(
    tmp_path: Path, url: str, capsys
) -> None:
    path = _station_file(tmp_path, 0, sessions=2)
    _publish(path, url, capsys)
    with Store.open(path) as store:
        record_review(store, 1, "reject", "reviewer B", "wrong chamber serial entered")
    said = _publish(path, url, capsys)
    assert "published 1 session(s)" in said and ": 1 rows; 1 already there" in said
    assert main(["sessions", "--db", url, "--json"]) == EXIT_OK
    reviews = [(row["id"], row["review"]) for row in json.loads(capsys.readouterr().out)]
    assert reviews == [(1, "rejected"), (2, "approved")]
    with department.open_department(url) as database:
        (station,) = database.stations()
        assert verify_session(database.store(station), 1).verified


def test_a_dropped_connection_loses_nothing_and_publishing_again_resumes(
    tmp_path: Path, url: str
) -> None:
    path = _station_file(tmp_path, 0, sessions=5)
    with Store.open(path, read_only=True) as store, department.open_department(url) as database:
        backend = database.connection.info.backend_pid

        def pull_the_cable(session, rows: int) -> None:
            if session.id == 2:  # the server ends the connection after the second session
                with psycopg.connect(url, autocommit=True) as other:
                    other.execute("SELECT pg_terminate_backend(%s)", (backend,))

        with pytest.raises(department.PublishInterrupted, match="lost after 2 session") as lost:
            department.publish_station(store, database, pull_the_cable)
        assert lost.value.published == 2
    assert _counts(url)["sessions"] == 2
    with Store.open(path, read_only=True) as store, department.open_department(url) as database:
        done = department.publish_station(store, database)
        assert (done.sessions_published, done.sessions_already) == (3, 2)
        (station,) = database.stations()
        copy = database.store(station)
        for session in store.sessions():
            assert verify_session(copy, session.id).verified
            assert copy.readings(session.id) == store.readings(session.id)
            assert copy.traffic(session.id) == store.traffic(session.id)


def test_open_sessions_wait_and_the_station_works_while_the_server_is_away(
    tmp_path: Path, url: str, capsys
) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        record_example_session(store)
        record_example_session(store, status="open")
    said = _publish(path, url, capsys)
    assert "published 1 session(s)" in said and "1 not closed yet" in said
    away = url.split("?host=")[0] + f"?host={tmp_path / 'no-server-here'}"
    assert main(["publish", "--db", str(path), "--to", away]) == EXIT_FAILURE
    assert "cannot reach the department database" in capsys.readouterr().err
    assert main(["sessions", "--db", away]) == EXIT_FAILURE
    assert "cannot reach the department database" in capsys.readouterr().err
    with Store.open(path) as store:  # the station file is untouched and still takes sessions
        assert record_example_session(store) == 3
        assert all(verify_session(store, n).verified for n in (1, 2, 3))


def test_publish_refuses_what_is_not_a_postgresql_url_and_an_empty_database(
    tmp_path: Path, server: Server, capsys
) -> None:
    path = _station_file(tmp_path, 0, sessions=1)
    assert main(["publish", "--db", str(path), "--to", "mysql://x/y"]) == EXIT_INVALID_INPUT
    assert "is not a PostgreSQL URL" in capsys.readouterr().err
    empty = server.new_database(f"empty_{next(_numbers)}")
    assert main(["publish", "--db", str(path), "--to", empty]) == EXIT_FAILURE
    assert "--create-schema" in capsys.readouterr().err
    assert main(["publish", "--db", str(path), "--to", empty, "--create-schema"]) == EXIT_OK
    assert "published 1 session(s)" in capsys.readouterr().out
    assert main(["sessions", "--db", str(path), "--station", "station-a"]) == EXIT_INVALID_INPUT
    assert "a station file holds one station" in capsys.readouterr().err


def test_the_session_overview_is_the_station_files_view_across_stations(
    stations: list[Path], url: str, capsys
) -> None:
    for path in stations:
        _publish(path, url, capsys)
    with psycopg.connect(url) as connection:
        cursor = connection.execute(
            "SELECT * FROM chargebook.session_overview ORDER BY station_uuid, session_id"
        )
        names = [column.name for column in cursor.description]
        found = [dict(zip(names, row, strict=True)) for row in cursor.fetchall()]
    expected = []
    for path in stations:
        connection = sqlite3.connect(path)
        cursor = connection.execute("SELECT * FROM session_overview ORDER BY session_id")
        station = connection.execute("SELECT uuid FROM station").fetchone()[0]
        columns = [column[0] for column in cursor.description]
        expected += [
            {"station_uuid": station, **dict(zip(columns, row, strict=True))} for row in cursor
        ]
        connection.close()
    expected.sort(key=lambda row: (row["station_uuid"], row["session_id"]))
    assert found == expected
    assert [row["review"] for row in found] == [
        "approved" if row["session_id"] == 2 else None for row in found
    ]


def test_a_renamed_station_is_read_by_its_new_name(tmp_path: Path, url: str, capsys) -> None:
    path = _station_file(tmp_path, 0, sessions=1)
    _publish(path, url, capsys)
    with Store.open(path) as store:
        store.name_station("linac hall 2")
    _publish(path, url, capsys)
    assert main(["sessions", "--db", url, "--station", "LINAC HALL 2", "--json"]) == EXIT_OK
    (row,) = json.loads(capsys.readouterr().out)
    assert row["station_name"] == "linac hall 2"
    assert _counts(url)["station_names"] == 2  # the old name is kept, append-only


def test_a_replaced_station_file_is_refused_in_words(tmp_path: Path, url: str, capsys) -> None:
    original = _station_file(tmp_path, 0, sessions=1)
    replaced = tmp_path / "replaced.sqlite"
    replaced.write_bytes(original.read_bytes())  # the same station, then two histories
    for path, scale in ((original, 1.0), (replaced, 1.01)):
        with Store.open(path) as store:
            record_example_session(store, scale=scale)
    _publish(original, url, capsys)
    before = _counts(url)
    for attempt in range(2):  # the same length of chain, then one row longer (a review)
        assert main(["publish", "--db", str(replaced), "--to", url]) == EXIT_FAILURE
        err = capsys.readouterr().err
        assert "session 2 (" in err and "of station station-a" in err
        assert "is not the one in the department record" in err and "replaced" in err
        assert _counts(url) == before  # nothing of the other history was published
        if attempt == 0:
            with Store.open(replaced) as store:
                record_review(store, 2, "approve", "reviewer B", "fine")


def test_stations_that_share_a_name_are_told_apart_by_their_uuid(
    tmp_path: Path, url: str, capsys
) -> None:
    # Two stations that kept the same name (as two left at their default, the host's, would).
    paths = []
    for folder in ("first", "second"):
        (tmp_path / folder).mkdir()
        paths.append(_station_file(tmp_path / folder, 0, sessions=1))
        _publish(paths[-1], url, capsys)
    uuids = []
    for path in paths:
        with Store.open(path, read_only=True) as store:
            uuids.append(store.station().uuid)
    labels = [f"{STATIONS[0]} ({uuid[:8]})" for uuid in uuids]
    assert main(["sessions", "--db", url]) == EXIT_OK
    listed = capsys.readouterr().out
    assert all(label in listed for label in labels)
    assert main(["history", "--beam", "6 MV", "--db", url, "--format", "json"]) == EXIT_OK
    points = json.loads(capsys.readouterr().out)["points"]
    assert sorted(point["station"] for point in points) == sorted(labels)
    # the start of the UUID the listing shows chooses the station
    assert main(["sessions", "--db", url, "--station", uuids[1][:8], "--json"]) == EXIT_OK
    (row,) = json.loads(capsys.readouterr().out)
    assert row["station_uuid"] == uuids[1] and row["station_name"] == STATIONS[0]
    # a session id both hold is refused, naming what chooses each
    assert main(["show", "1", "--db", url]) != EXIT_OK
    refusal = capsys.readouterr().err
    assert uuids[0][:8] in refusal and uuids[1][:8] in refusal
