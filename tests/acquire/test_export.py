"""CSV and JSON exports, read back and compared with the store and with hand-computed physics.

Sessions are recorded in a real SQLite file through the Store API with the readings of the
invented example worksheet (Example Clinic (fictional), DEMO-LA1 6 MV; not a real measurement).
"""

from __future__ import annotations

import csv
import io
import json
import statistics
from pathlib import Path

import pytest
from chargebook.acquire.protocol import CAUTION
from chargebook.acquire.record.events import EventKind, InstrumentIdentified
from chargebook.acquire.record.store import Store
from chargebook.acquire.reports.data import load_record
from chargebook.acquire.reports.export import CSV_COLUMNS, JSON_KEYS, to_csv, to_json
from recorded_session import (
    INSTRUMENT,
    SUPERSEDE_REASON,
    SETTLING_READING_nC,
    example,
    recorded_station,
)


@pytest.fixture
def station(tmp_path: Path) -> Path:
    return recorded_station(tmp_path)


@pytest.fixture
def reader(station: Path) -> Store:
    store = Store.open(station, read_only=True)
    yield store
    store.close()


def hand_dose_per_MU_cGy() -> float:
    """Dose per MU of the example, computed here from the published formulas, not the library."""
    data = example()
    env, cal = data["environment"], data["calibration"]
    M_plus = statistics.fmean(data["readings"]["routine_nC"])
    M_minus = statistics.fmean(data["readings"]["opposite_nC"])
    M_reduced = statistics.fmean(data["readings"]["reduced_nC"])
    # IAEA TRS-398: k_TP = ((273.2 + T) / (273.2 + T0)) · (P0 / P), T0 = 20 °C, P0 = 101.325 kPa.
    k_TP = (273.2 + env["temperature_C"]) / (273.2 + 20.0) * (101.325 / env["pressure_kPa"])
    # IAEA TRS-398: k_pol = (|M+| + |M−|) / (2 |M|), M at the routine polarity.
    k_pol = (abs(M_plus) + abs(M_minus)) / (2 * abs(M_plus))
    # IAEA TRS-398 two-voltage method, pulsed beam, V1/V2 = 3: a0 = 1.198, a1 = −0.875,
    # a2 = 0.677 (from memory, see docs/physics.md).
    ratio = M_plus / M_reduced
    k_s = 1.198 - 0.875 * ratio + 0.677 * ratio**2
    dose_Gy = M_plus * k_TP * k_pol * k_s * cal["k_elec"] * cal["N_Dw_Gy_per_nC"] * cal["k_Q"]
    return 100.0 * dose_Gy / cal["monitor_units"]


# ------------------------------------------------------------------------------------ CSV


def test_csv_has_every_reading_as_stored(reader: Store) -> None:
    record = load_record(reader, 1)
    rows = list(csv.DictReader(io.StringIO(to_csv(record))))
    assert tuple(rows[0]) == CSV_COLUMNS
    stored = reader.readings(1)
    assert [int(r["reading_id"]) for r in rows] == [r.id for r in stored]
    assert [float(r["charge_nC"]) for r in rows] == [r.charge_nC for r in stored]
    assert [float(r["t_s"]) for r in rows] == [r.t_s for r in stored]
    sets = {s.id: s for s in reader.sets(1)}
    for row in rows:
        reading_set = sets[int(row["set_id"])]
        assert row["set_status"] == reading_set.status
        assert float(row["bias_V"]) == reading_set.bias_V
        assert int(row["polarity"]) == reading_set.polarity


def test_csv_marks_which_readings_count(reader: Store) -> None:
    rows = list(csv.DictReader(io.StringIO(to_csv(load_record(reader, 1)))))
    settling = [r for r in rows if r["settling"] == "1"]
    assert [float(r["charge_nC"]) for r in settling] == [SETTLING_READING_nC]
    superseded = [r for r in rows if r["set_status"] == "superseded"]
    assert len(superseded) == 2 and all(r["used"] == "0" for r in superseded)
    used = [r for r in rows if r["used"] == "1"]
    # routine 5 + opposite 3 + reduced 3 (the example worksheet's counts): the leakage reading
    # is read for the leakage check, not for the dose.
    assert len(used) == 11 and {r["role"] for r in used} == {"dose"}
    assert [r["role"] for r in rows if r["purpose"] == "leakage"] == ["leakage check"]
    assert {r["role"] for r in superseded} == {"set superseded"}
    assert [r["role"] for r in settling] == ["settling"]
    routine = [float(r["charge_nC"]) for r in used if r["purpose"] == "routine"]
    assert routine == example()["readings"]["routine_nC"]
    manual = [r for r in rows if r["capture"] == "manual"]
    assert len(manual) == 1 and manual[0]["purpose"] == "opposite"


# ----------------------------------------------------------------------------------- JSON


def _strict(text: str) -> dict:
    def refuse(constant: str) -> None:
        raise AssertionError(f"non-standard JSON constant {constant}")

    return json.loads(text, parse_constant=refuse)


def test_json_has_exactly_the_documented_keys(reader: Store) -> None:
    data = _strict(to_json(load_record(reader, 1)))
    assert tuple(data) == JSON_KEYS
    assert data["format"] == "chargebook-session" and data["format_version"] == 1
    assert data["caution"] == CAUTION
    assert data["results_error"] is None


def test_json_session_sets_and_readings_match_the_store(reader: Store) -> None:
    data = _strict(to_json(load_record(reader, 1)))
    session = reader.session(1)
    assert data["session"]["metadata"] == session.metadata()
    assert data["session"]["plan"] == session.plan()
    assert data["session"]["status"] == "finished"
    assert [s["id"] for s in data["sets"]] == [s.id for s in reader.sets(1)]
    exported = [
        (r["id"], r["charge_nC"], r["settling"]) for s in data["sets"] for r in s["readings"]
    ]
    assert exported == [(r.id, r.charge_nC, r.settling) for r in reader.readings(1)]
    superseded = [s for s in data["sets"] if s["status"] == "superseded"]
    assert [s["reason"] for s in superseded] == [SUPERSEDE_REASON]
    assert [e["kind"] for e in data["events"]] == [e.kind for e in reader.events(1)]
    assert data["events"][0]["detail"] == reader.events(1)[0].detail()
    assert [e["pressure_unit"] for e in data["environment"]] == ["hPa", "hPa"]
    assert data["instrument"] == INSTRUMENT
    assert data["traffic_lines"] == 2 and "traffic" not in data


def test_json_results_are_recomputed_and_agree_with_hand_physics(reader: Store) -> None:
    results = _strict(to_json(load_record(reader, 1)))["results"]
    assert results["dose_per_MU_cGy"] == pytest.approx(hand_dose_per_MU_cGy(), rel=1e-9)
    assert results["factor_states"]["k_pol"] == "measured"
    assert results["M_raw_nC"] == pytest.approx(
        statistics.fmean(example()["readings"]["routine_nC"])
    )
    conversions = [c["text"] for c in results["conversions"]]
    assert conversions == ["pressure 1006 hPa = 100.6 kPa"]


def test_json_with_traffic_keeps_the_raw_lines(reader: Store) -> None:
    data = _strict(to_json(load_record(reader, 1), reader, include_traffic=True))
    assert [(t["direction"], t["line"]) for t in data["traffic"]] == [
        ("tx", "*IDN?\n"),
        ("rx", "Bench,SIM-MODEL-1,SIM-EM-0001,1.4\r\n"),
    ]


IDENTIFIED = EventKind.INSTRUMENT_IDENTIFIED


def identified(identity: str) -> InstrumentIdentified:
    """Return an instrument's identification as the engine records it."""
    return InstrumentIdentified(identity=identity, profile="scpi-generic")


def test_an_identity_taken_before_the_session_opened_is_reported(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        store.add_event(None, "daemon", IDENTIFIED, identified("old, SIM-EM-1000"))
        store.add_event(None, "daemon", IDENTIFIED, identified("sim, SIM-EM-0001"))
        session_id = store.create_session({"beam": "6 MV"}, {"steps": []}, "trs398", "6 MV")
        store.set_session_status(session_id, "finished")
        store.add_event(None, "daemon", IDENTIFIED, identified("later, SIM-EM-3000"))
    with Store.open(path, read_only=True) as store:
        data = _strict(to_json(load_record(store, session_id)))
    assert data["instrument"] == identified("sim, SIM-EM-0001")


def test_a_session_without_results_exports_what_it_has(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        session_id = store.create_session(
            {"treatment_machine": "DEMO-LA2"}, {"steps": []}, "tg51", "10 MV"
        )
        set_id = store.add_set(session_id, 0, "routine", "routine", 1, 300.0, 1)
        store.add_reading(session_id, set_id, 1, 1.0, 14.2, "auto", False, "ok")
    with Store.open(path, read_only=True) as store:
        record = load_record(store, session_id)
        data = _strict(to_json(record))
        assert data["results"] is None
        assert data["results_error"] == (
            "the stored plan cannot be read: name is missing (allowed: the plan's name)"
        )
        assert [r["charge_nC"] for s in data["sets"] for r in s["readings"]] == [14.2]
        rows = list(csv.DictReader(io.StringIO(to_csv(record))))
        assert [(r["charge_nC"], r["used"], r["role"]) for r in rows] == [
            ("14.2", "0", "set collecting")
        ]
