"""`chargebook register` on a station file with no daemon (issue 14 item 1): add, list, show,
supersede and fields, in words and as JSON; bad input refused by name with exit 2 and nothing
written. Run in-process (``main``), as typed. Invented demo data (Example Clinic (fictional)).
A row added through the real daemon is in ``tests/e2e/test_registers_e2e.py``.
"""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

from chargebook.acquire.commands.cli import main
from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT, EXIT_OK
from chargebook.acquire.record.station_lock import StationLock

CHAMBER = ["model=thimble 0.6 cc", "serial=SIM-CH-0001", "type=cylindrical"]
CERTIFICATE = [
    "chamber=1", "N_Dw=50.4", "N_Dw_unit=cGy/nC", "laboratory=Example Calibration Laboratory "
    "(fictional)", "number=SIM-CAL-0001", "date=2026-05-12", "U_pct=1.1", "coverage_k=2",
    "reference_quality=Co-60",
]  # fmt: skip


def _register(db: Path, *args: str) -> int:
    return main(["register", *args, "--db", str(db)])


def _rows(db: Path) -> list[tuple]:
    conn = sqlite3.connect(db)
    try:
        return conn.execute("SELECT * FROM register_rows").fetchall()
    finally:
        conn.close()


def test_add_list_show_and_supersede_as_typed(tmp_path: Path, capsys) -> None:
    db = tmp_path / "station.sqlite"
    assert _register(db, "add", "chamber", *CHAMBER, "--actor", "physicist C") == EXIT_OK
    assert "row    1  chamber      SIM-CH-0001" in capsys.readouterr().out
    assert _register(db, "add", "certificate", *CERTIFICATE, "--json") == EXIT_OK
    added = json.loads(capsys.readouterr().out)
    assert added["fields"]["N_Dw"] == 50.4 and added["fields"]["N_Dw_unit"] == "cGy/nC"
    assert added["name"] == "SIM-CAL-0001 (Example Calibration Laboratory (fictional), 2026-05-12)"
    command = ["supersede", "2", "U_pct=1.2", "--reason", "read again", "--effective", "2027-01-01"]
    assert _register(db, *command) == EXIT_OK
    capsys.readouterr()
    assert _register(db, "list", "--json") == EXIT_OK
    listed = json.loads(capsys.readouterr().out)["rows"]
    assert [(row["id"], row["kind"]) for row in listed] == [(1, "chamber"), (3, "certificate")]
    assert _register(db, "show", "2") == EXIT_OK
    shown = capsys.readouterr().out
    assert "superseded by row 3" in shown and "U_pct                  1.1" in shown
    assert _register(db, "list", "--all", "--kind", "certificate") == EXIT_OK
    assert capsys.readouterr().out.count("certificate") == 2


def test_bad_input_is_refused_by_name_and_nothing_is_written(tmp_path: Path, capsys) -> None:
    db = tmp_path / "station.sqlite"
    assert _register(db, "add", "chamber", *CHAMBER) == EXIT_OK
    before = _rows(db)
    no_unit = [value for value in CERTIFICATE if not value.startswith("N_Dw_unit")]
    for args, named in (
        (["add", "chamber", "model=thimble", "type=cylindrical"], "serial is missing"),
        (["add", "certificate", *no_unit], "N_Dw_unit is missing"),
        (["add", "certificate", *CERTIFICATE[:-4], "date=2099-01-01", *CERTIFICATE[-3:]],
         "date = '2099-01-01' is in the future"),
        (["add", "chamber", "serial"], "'serial' is not FIELD=VALUE"),
        (["supersede", "1", "type=spherical", "--reason", "x"], "type = 'spherical' is not known"),
        (["show", "9"], "no register row with id 9"),
    ):  # fmt: skip
        assert _register(db, *args) == EXIT_INVALID_INPUT, args
        assert named in capsys.readouterr().err, args
    assert _rows(db) == before


def test_fields_lists_what_a_kind_holds(capsys) -> None:
    assert main(["register", "fields", "k_Q"]) == EXIT_OK
    out = capsys.readouterr().out
    assert "source" in out and "required" in out and "u_pct" in out


def test_a_write_waits_for_no_daemon_but_is_refused_while_another_holds_the_lock(
    tmp_path: Path, capsys
) -> None:
    """A file held by a daemon is written through its socket: with none listening, the command
    says so and writes nothing."""
    db = tmp_path / "station.sqlite"
    assert _register(db, "add", "chamber", *CHAMBER) == EXIT_OK
    with StationLock(db):
        socket = tmp_path / "none.sock"
        assert main(["register", "add", "machine", "name=DEMO-LA1", "--db", str(db),
                     "--socket", str(socket)]) == 1  # fmt: skip
    assert "must go through it" in capsys.readouterr().err
    assert len(_rows(db)) == 1


def _beam(machine: int, name: str) -> list[str]:
    """A photon beam row (invented demo values; TPR20,10 0.67 is typical of 6 MV, from memory)."""
    return ["add", "beam", f"machine={machine}", f"name={name}", "modality=photon",
            "nominal_energy=6", "beam_type=pulsed", "TPR20_10=0.67",
            "quality_measured_on=2026-05-01"]  # fmt: skip


def test_a_second_current_entry_of_the_same_thing_is_refused(tmp_path: Path, capsys) -> None:
    """One current entry per chamber (serial), per machine (name), per beam on its machine."""
    db = tmp_path / "station.sqlite"
    assert _register(db, "add", "chamber", *CHAMBER) == EXIT_OK  # row 1
    assert _register(db, "add", "machine", "name=DEMO-LA1") == EXIT_OK  # row 2
    assert _register(db, "add", "machine", "name=DEMO-LA2") == EXIT_OK  # row 3
    assert _register(db, *_beam(2, "6 MV")) == EXIT_OK  # row 4
    assert _register(db, "add", "chamber", "serial=SIM-CH-0002", "type=cylindrical") == EXIT_OK
    capsys.readouterr()
    before = _rows(db)
    for args, named in (
        (["add", "chamber", *CHAMBER], "is already registered as row 1 (chamber SIM-CH-0001)"),
        (["add", "chamber", "serial= sim-ch-0001", "type=cylindrical"], "as row 1"),
        (["add", "machine", "name=demo-la1"], "is already registered as row 2"),
        (_beam(2, "6  mv"), "is already registered as row 4 (beam DEMO-LA1 6 MV)"),
        (["supersede", "5", "serial=SIM-CH-0001", "--reason", "typo"], "as row 1"),
    ):  # fmt: skip
        assert _register(db, *args) == EXIT_INVALID_INPUT, args
        err = capsys.readouterr().err
        assert named in err and "supersede it" in err, (args, err)
    assert _rows(db) == before
    assert _register(db, "add", "electrometer", "serial=SIM-CH-0001") == EXIT_OK  # another kind
    assert _register(db, *_beam(3, "6 MV")) == EXIT_OK  # the same name on another machine
    assert _register(db, "supersede", "1", "model=thimble", "--reason", "read again") == EXIT_OK


def test_a_certificate_or_k_q_keeps_the_chamber_it_belongs_to(tmp_path: Path, capsys) -> None:
    db = tmp_path / "station.sqlite"
    assert _register(db, "add", "chamber", *CHAMBER) == EXIT_OK  # row 1
    assert _register(db, "add", "chamber", "serial=SIM-CH-0002", "type=cylindrical") == EXIT_OK
    assert _register(db, "add", "certificate", *CERTIFICATE) == EXIT_OK  # row 3, chamber 1
    assert _register(db, "add", "machine", "name=DEMO-LA1") == EXIT_OK  # row 4
    assert _register(db, *_beam(4, "6 MV")) == EXIT_OK  # row 5
    assert _register(db, *_beam(4, "10 MV")) == EXIT_OK  # row 6
    k_q = ["add", "k_Q", "chamber=1", "beam=5", "value=0.99", "source=invented", "u_pct=0.5"]
    assert _register(db, *k_q) == EXIT_OK  # row 7
    capsys.readouterr()
    before = _rows(db)
    moved = ["--reason", "moved"]
    for args, named in (
        (["supersede", "3", "chamber=2", *moved], "chamber = 2 would move a certificate"),
        (["supersede", "7", "chamber=2", *moved], "chamber = 2 would move a k_Q"),
        (["supersede", "7", "beam=6", *moved], "beam = 6 would move a k_Q"),
    ):  # fmt: skip
        assert _register(db, *args) == EXIT_INVALID_INPUT, args
        assert named in capsys.readouterr().err, args
    assert _rows(db) == before
    assert _register(db, "supersede", "3", "U_pct=1.2", "--reason", "read again") == EXIT_OK
