"""The station's registers (issue 14 item 1): append-only rows, superseded not edited, audited
in the hash chain; every field checked by name before anything is written.

A real SQLite file through the Store API. The registers are the invented demo clinic's
(Example Clinic (fictional)): invented data, for the demo only.
"""

from __future__ import annotations

import datetime
import sqlite3
from pathlib import Path

import pytest
from chargebook.acquire.commands.demo_data import add_demo_registers
from chargebook.acquire.record.registers import entry_rows, register_row, register_rows
from chargebook.acquire.record.store import Store
from chargebook.acquire.record.verify import verify_session
from chargebook.acquire.session.metadata import validate_metadata
from chargebook.acquire.session.register_rows import (
    add_row,
    find_beam,
    select,
    supersede_row,
)
from chargebook.corrections.errors import InputError
from test_review import _dump

TODAY = datetime.date(2026, 12, 3)


@pytest.fixture
def station(tmp_path: Path) -> Path:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        add_demo_registers(store, actor="physicist C", today=TODAY)
    return path


@pytest.fixture
def store(station: Path):
    with Store.open(station) as opened:
        yield opened


def _ids(store: Store) -> dict[str, int]:
    by_name = {}
    for row in register_rows(store):
        by_name[(row.kind, row.fields.get("serial") or row.fields.get("name"))] = row.id
    return by_name


def test_every_register_row_is_audited_in_the_chain_outside_sessions(store: Store) -> None:
    rows = register_rows(store)
    assert {row.kind for row in rows} == {
        "machine", "beam", "chamber", "certificate", "electrometer", "thermometer", "barometer",
        "k_Q",
    }  # fmt: skip
    events = {event.id: event for event in store.events(None)}
    for row in rows:
        assert events[row.event_id].kind == "register_row"
        assert events[row.event_id].detail()["fields"] == row.fields
        assert events[row.event_id].actor == "physicist C"
    assert verify_session(store, None).verified


def test_a_row_cannot_be_changed_or_deleted_and_a_changed_row_shows(station: Path) -> None:
    conn = sqlite3.connect(station)
    with pytest.raises(sqlite3.IntegrityError, match="append-only"):
        conn.execute("UPDATE register_rows SET fields_json = '{}' WHERE id = 1")
    with pytest.raises(sqlite3.IntegrityError, match="supersede it instead"):
        conn.execute("DELETE FROM register_rows WHERE id = 1")
    with pytest.raises(sqlite3.IntegrityError, match="register_row event"):
        conn.execute(
            "INSERT INTO register_rows (id, kind, entry_id, effective_from, fields_json, "
            "recorded_at, event_id) VALUES (99, 'machine', 99, '2026-01-01', '{}', 'x', 1)"
        )
    # another program drops the trigger and edits a row: verify names the row
    conn.execute("DROP TRIGGER register_rows_refuse_update")
    conn.execute("""UPDATE register_rows SET fields_json = '{"name": "DEMO-LA9"}' WHERE id = 1""")
    conn.commit()
    conn.close()
    with Store.open(station, read_only=True) as store:
        report = verify_session(store, None)
    assert not report.verified
    assert [(p.table, p.row_id) for p in report.problems] == [("register_rows", 1)]
    assert "fields" in report.problems[0].problem


def test_superseding_keeps_the_old_row_and_dates_the_new_one(store: Store) -> None:
    chamber = _ids(store)[("chamber", "SIM-CH-0001")]
    new = supersede_row(
        store,
        chamber,
        {"cavity_volume_cm3": "0.65"},
        actor="physicist C",
        reason="volume from the maker's sheet",
        effective_from="2026-12-03",
        today=TODAY,
    )
    assert new.supersedes == chamber and new.entry_id == chamber
    assert new.fields["cavity_volume_cm3"] == 0.65
    assert register_row(store, chamber).superseded_by == new.id
    assert [row.id for row in entry_rows(store, chamber)] == [chamber, new.id]
    assert all(row.id != chamber for row in register_rows(store, "chamber"))
    assert store.events(None)[-1].detail()["reason"] == "volume from the maker's sheet"
    with pytest.raises(InputError, match="already superseded by row"):
        supersede_row(store, chamber, {}, actor="physicist C", reason="again", today=TODAY)


@pytest.mark.parametrize(
    ("kind", "fields", "named"),
    [
        ("chamber", {"model": "thimble", "type": "cylindrical"}, "serial is missing"),
        ("electrometer", {"serial": "  "}, "serial = "),
        ("thermometer", {"model": "x"}, "serial is missing"),
        (
            "certificate",
            {
                "chamber": "@ch1", "N_Dw": 0.05, "N_Dw_unit": "Gy/nC", "laboratory": "lab",
                "number": "1", "date": "2027-01-05", "U_pct": 1.1, "coverage_k": 2,
                "reference_quality": "Co-60",
            },
            "date = '2027-01-05' is in the future",
        ),
        (
            "certificate",
            {
                "chamber": "@ch1", "N_Dw": 0.05, "laboratory": "lab", "number": "1",
                "date": "2026-01-05", "U_pct": 1.1, "coverage_k": 2, "reference_quality": "Co-60",
            },
            "N_Dw_unit is missing",
        ),
        ("k_Q", {"chamber": "@ch1", "beam": "@la1_6mv", "value": 0.99, "u_pct": 1},
         "source is missing"),
        ("k_Q", {"chamber": "@la1_6mv", "beam": "@la1_6mv", "value": 0.99, "u_pct": 1,
                 "source": "t"}, "is a beam row"),
    ],
)  # fmt: skip
def test_bad_rows_are_refused_by_name_and_nothing_is_written(
    station: Path, kind: str, fields: dict, named: str
) -> None:
    with Store.open(station) as store:
        ids = {
            "ch1": _ids(store)[("chamber", "SIM-CH-0001")],
            "la1_6mv": find_beam(store, "DEMO-LA1 6 MV").id,
        }
    given = {
        k: ids[v[1:]] if isinstance(v, str) and v.startswith("@") else v for k, v in fields.items()
    }
    before = _dump(station)
    with Store.open(station) as store, pytest.raises(InputError, match=named):
        add_row(store, kind, given, actor="physicist C", today=TODAY)
    assert _dump(station) == before


def test_a_beam_is_found_by_name_whatever_the_spacing_or_by_id(store: Store) -> None:
    six = find_beam(store, "DEMO-LA1 6 MV")
    assert find_beam(store, "6mv").id == six.id
    assert find_beam(store, str(six.id)).id == six.id
    with pytest.raises(InputError, match="the closest being DEMO-LA1 10 MeV"):
        find_beam(store, "DEMO-LA1 10 MV")


def test_a_selection_fills_the_session_and_warns_in_words(store: Store) -> None:
    ids = _ids(store)
    beam = find_beam(store, "6 MV")
    picked = select(
        store,
        {
            "beam": beam.id,
            "chamber": ids[("chamber", "SIM-CH-0001")],
            "electrometer": ids[("electrometer", "SIM-EM-0001")],
        },
        on=TODAY,
    )
    filled = picked.metadata_fields()
    assert filled["treatment_machine"] == "DEMO-LA1" and filled["beam"] == "6 MV"
    assert filled["N_Dw"] == 0.0504 and filled["k_Q"] == 0.992
    assert filled["calibration_date"] == (TODAY - datetime.timedelta(days=200)).isoformat()
    meta = validate_metadata({**filled, "convention": "trs398", "operator": "operator A"})
    assert meta.k_Q_source.startswith("invented demo value")
    assert picked.warnings() == []
    assert picked.copy()["certificate"]["fields"]["number"] == "SIM-CAL-0001"
    # two years and a day later (validity two years, common practice) the certificate has expired
    later = TODAY + datetime.timedelta(days=2 * 365 - 200 + 2)
    words = select(store, picked.ids(), on=later).warnings()
    assert any("past its validity of 2 years" in w and "SIM-CAL-0001" in w for w in words)
    # the electron beam has no k_Q for this chamber, and the plane-parallel chamber no certificate
    electron = select(
        store,
        {
            "beam": find_beam(store, "10 MeV").id,
            "chamber": ids[("chamber", "SIM-CH-0003")],
            "electrometer": ids[("electrometer", "SIM-EM-0001")],
        },
        on=TODAY,
    ).warnings()
    assert "chamber SIM-CH-0003 has no calibration certificate in the registers" in electron
    assert "chamber SIM-CH-0003 has no k_Q for beam DEMO-LA1 10 MeV in the registers" in electron


def test_a_selection_refuses_a_certificate_of_another_chamber(store: Store) -> None:
    ids = _ids(store)
    certificate = register_rows(store, "certificate")[0].id
    with pytest.raises(InputError, match=r"registers\.certificate = \d+ is for another chamber"):
        select(
            store,
            {
                "beam": find_beam(store, "6 MV").id,
                "chamber": ids[("chamber", "SIM-CH-0003")],
                "electrometer": ids[("electrometer", "SIM-EM-0001")],
                "certificate": certificate,
            },
            on=TODAY,
        )


def test_a_session_named_by_register_rows_keeps_their_copy_and_warnings(
    store: Store, station: Path, capsys
) -> None:
    from chargebook.acquire.commands.cli import main
    from chargebook.acquire.engine.engine import Engine
    from chargebook.corrections.stability import Thresholds

    ids = _ids(store)
    chamber = ids[("chamber", "SIM-CH-0001")]
    names = {
        "beam": find_beam(store, "DEMO-LA1 6 MV").id,
        "chamber": chamber,
        "electrometer": ids[("electrometer", "SIM-EM-0001")],
        "thermometer": ids[("thermometer", "SIM-TP-0001")],
    }
    short = Thresholds(certificate_validity_years=0.1)  # a setting: short, to see a warning
    engine = Engine(store, thresholds=short)
    session = engine.start_session(
        {"registers": names, "convention": "trs398", "operator": "operator A"}, "default"
    )
    kept = store.session(session).metadata()
    assert kept["chamber_serial"] == "SIM-CH-0001" and kept["N_Dw"] == 0.0504
    assert kept["registers"]["certificate"] == register_rows(store, "certificate")[0].id
    assert any("past its validity of 0.1 years" in w for w in kept["register_warnings"])
    # a later edit of the registers does not change the session's copy
    supersede_row(store, chamber, {"model": "thimble 0.6 cc, relabelled"}, actor="physicist C",
                  reason="label", today=TODAY)  # fmt: skip
    assert store.session(session).metadata()["register_copy"]["chamber"]["fields"]["model"] == (
        "thimble 0.6 cc"
    )
    assert main(["show", str(session), "--db", str(station)]) == 0
    shown = " ".join(capsys.readouterr().out.split())
    assert f"From the registers beam DEMO-LA1 6 MV (row {names['beam']})" in shown
    assert "Register warnings the certificate SIM-CAL-0001" in shown


def test_a_typed_value_that_contradicts_the_registers_is_refused(store: Store) -> None:
    from chargebook.acquire.engine.engine import Engine

    ids = _ids(store)
    names = {
        "beam": find_beam(store, "6 MV").id,
        "chamber": ids[("chamber", "SIM-CH-0001")],
        "electrometer": ids[("electrometer", "SIM-EM-0001")],
    }
    meta = {"registers": names, "convention": "trs398", "operator": "operator A", "k_Q": 0.98}
    with pytest.raises(InputError, match=r"k_Q = 0\.98 differs from the registers"):
        Engine(store).start_session(meta, "default")
    assert store.sessions() == []


def test_a_recorded_session_started_again_keeps_its_copy_without_the_registers(
    store: Store,
) -> None:
    """A replay starts the recorded session again in a store of its own, which holds no
    registers: the recorded copy stands, unchanged."""
    from chargebook.acquire.engine.engine import Engine

    ids = _ids(store)
    names = {
        "beam": find_beam(store, "6 MV").id,
        "chamber": ids[("chamber", "SIM-CH-0001")],
        "electrometer": ids[("electrometer", "SIM-EM-0001")],
    }
    meta = {"registers": names, "convention": "trs398", "operator": "operator A"}
    recorded = store.session(Engine(store).start_session(meta, "default")).metadata()
    elsewhere = Store.memory()
    again = elsewhere.session(Engine(elsewhere).start_session(recorded, "default")).metadata()
    assert again == recorded


def test_a_carried_factor_from_another_chamber_than_the_registers_one_is_refused(
    store: Store,
) -> None:
    from chargebook.acquire.engine.engine import Engine

    ids = _ids(store)
    names = {
        "beam": find_beam(store, "6 MV").id,
        "chamber": ids[("chamber", "SIM-CH-0001")],
        "electrometer": ids[("electrometer", "SIM-EM-0001")],
    }
    other = {"value": 1.002, "source": "entered", "date": "2026-11-02"}
    meta = {
        "registers": names,
        "convention": "trs398",
        "operator": "operator A",
        "carried_k_pol": {**other, "chamber_serial": "SIM-CH-0003"},
        "carried_k_s": {**other, "chamber_serial": "SIM-CH-0001"},
    }
    with pytest.raises(InputError, match=r"carried_k_pol\.chamber_serial .*another chamber"):
        Engine(store).start_session(meta, "monthly-check")
    assert store.sessions() == []
