"""`chargebook backup` on a real station file with no daemon: refusals, and a copy that does not
verify. The copy taken while the real daemon measures is in tests/e2e/test_backup_e2e.py."""

from __future__ import annotations

import sqlite3
from pathlib import Path

from chargebook.acquire.commands.cli import main
from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK
from chargebook.acquire.record.store import Store
from recorded_session import recorded_station


def test_a_copy_verifies_and_an_existing_out_is_kept_unless_force(tmp_path: Path, capsys) -> None:
    station = recorded_station(tmp_path)
    out = tmp_path / "copy.sqlite"
    out.write_text("an older backup")
    assert main(["backup", "--db", str(station), str(out)]) == EXIT_INVALID_INPUT
    assert "OUT" in capsys.readouterr().err and out.read_text() == "an older backup"
    assert main(["backup", "--db", str(station), str(out), "--force"]) == EXIT_OK
    assert "1 session(s), 2 hash chain(s) verified" in capsys.readouterr().out
    with Store.open(out, read_only=True) as copy, Store.open(station, read_only=True) as source:
        assert copy.station() == source.station()  # the same station, the same ids
        assert copy.readings(1) == source.readings(1)


def test_a_missing_station_and_out_on_the_station_itself_are_refused(
    tmp_path: Path, capsys
) -> None:
    missing = tmp_path / "none.sqlite"
    assert main(["backup", "--db", str(missing), str(tmp_path / "c.sqlite")]) == EXIT_INVALID_INPUT
    assert "does not exist" in capsys.readouterr().err
    station = recorded_station(tmp_path)
    assert main(["backup", "--db", str(station), str(station), "--force"]) == EXIT_INVALID_INPUT
    assert "is the source" in capsys.readouterr().err


def test_a_copy_of_a_changed_record_is_kept_but_says_it_does_not_verify(
    tmp_path: Path, capsys
) -> None:
    station = recorded_station(tmp_path)
    conn = sqlite3.connect(station)
    with conn:
        conn.execute("DROP TRIGGER readings_refuse_update")
        conn.execute("UPDATE readings SET charge_nC = charge_nC * 1.01 WHERE id = 3")
    conn.close()
    out = tmp_path / "copy.sqlite"
    assert main(["backup", "--db", str(station), str(out)]) == EXIT_FAILURE
    error = capsys.readouterr().err
    assert "DOES NOT VERIFY" in error and "readings row 3" in error
    assert out.is_file()


def test_a_backup_into_a_missing_folder_names_that_folder(tmp_path: Path, capsys) -> None:
    station = recorded_station(tmp_path)
    out = tmp_path / "no-such-folder" / "copy.sqlite"
    assert main(["backup", "--db", str(station), str(out)]) == EXIT_FAILURE
    err = capsys.readouterr().err
    assert f"the folder {out.parent} does not exist" in err and str(station) not in err
