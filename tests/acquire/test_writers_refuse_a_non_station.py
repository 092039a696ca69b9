"""The commands that write a station file refuse a file that is not one, writing nothing.

`review` and `register add/supersede` write directly (under the station lock) when no daemon
holds the file; a 0-byte file or an SQLite file at schema version 0 is not a station database,
and is left exactly as it was (no bytes, no lock or -wal file beside it). `serve` checks its
socket folder before it creates the station database. Real files, the real CLI in-process.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT

REVIEW = ["review", "1", "--approve", "--reviewer", "x", "--comment", "y"]
ADD = ["register", "add", "chamber", "model=thimble", "serial=SIM-CH-0001", "type=cylindrical"]
SUPERSEDE = ["register", "supersede", "1", "model=thimble 2", "--reason", "typo"]


def _empty(folder: Path) -> Path:
    path = folder / "e2.sqlite"
    path.write_bytes(b"")
    return path


def _version_zero(folder: Path) -> Path:
    """An SQLite file of someone else's (a table of notes), never a chargebook record."""
    path = folder / "notes.sqlite"
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE notes (text TEXT)")
    conn.execute("INSERT INTO notes VALUES ('keep me')")
    conn.commit()
    conn.close()
    return path


@pytest.mark.parametrize("command", [REVIEW, ADD, SUPERSEDE], ids=["review", "add", "supersede"])
@pytest.mark.parametrize("make", [_empty, _version_zero], ids=["empty", "schema-0"])
def test_a_writer_refuses_a_file_that_is_not_a_station_database(
    tmp_path: Path, capsys, command: list[str], make
) -> None:
    path = make(tmp_path)
    before = path.read_bytes()
    status = main([*command, "--db", str(path)])
    err = capsys.readouterr().err
    assert status == EXIT_INVALID_INPUT
    assert f"{path} is not a station database" in err and "Traceback" not in err
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == [path.name]


def test_review_refuses_a_missing_file_and_creates_nothing(tmp_path: Path, capsys) -> None:
    path = tmp_path / "absent.sqlite"
    assert main([*REVIEW, "--db", str(path)]) == EXIT_INVALID_INPUT
    assert "no station database at" in capsys.readouterr().err
    assert list(tmp_path.iterdir()) == []


def test_serve_checks_the_socket_folder_before_creating_the_database(
    tmp_path: Path, capsys
) -> None:
    folder = tmp_path / "shared"
    folder.mkdir()
    folder.chmod(0o755)  # others may enter it: no place for the daemon's socket
    db = tmp_path / "station.sqlite"
    argv = ["serve", "--profile", "query-plain", "--port", "/dev/null", "--db", str(db)]
    status = main([*argv, "--socket", str(folder / "sv.sock")])
    err = capsys.readouterr().err
    assert status == EXIT_INVALID_INPUT
    assert "mode 755" in err and "Traceback" not in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["shared"]
    assert list(folder.iterdir()) == []
