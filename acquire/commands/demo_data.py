"""Invented data for the demo only: our own clinic, machine, chamber and electrometer.

Every name here is made up so that it cannot be taken for a real one: the clinic is called
"Example Clinic (fictional)", its machines carry the prefix ``DEMO-`` (linac "DEMO-LA1"), the
serials of the chamber ("thimble 0.6 cc", SIM-CH-0001) and of the electrometer (SIM-EM-0001) the
prefix ``SIM-``, and people appear only as roles ("demo operator", "operator A", "reviewer B"),
never as personal names. The calibration numbers are plausible magnitudes for a 0.6 cc
chamber in a 6 MV beam (about 20 nC per 100 MU), chosen so that the simulated chamber reads near
1 cGy/MU. Never use them for a real beam.
"""

from __future__ import annotations

from typing import Any

DEMO_METADATA: dict[str, Any] = {
    "treatment_machine": "DEMO-LA1",
    "beam": "6 MV",
    "beam_type": "pulsed",
    "convention": "trs398",
    "chamber_model": "thimble 0.6 cc",
    "chamber_serial": "SIM-CH-0001",
    "electrometer_model": "simulated electrometer",
    "electrometer_serial": "SIM-EM-0001",
    "operator": "demo operator",
    "N_Dw": 0.0504,
    "N_Dw_unit": "Gy/nC",
    "u_N_Dw_pct_k2": 1.1,
    "k_Q": 0.992,
    "u_k_Q_pct": 1.0,
    "expected_cGy_per_MU": 1.0,
    "tolerance_pct": 2.0,
    "notes": "Demo session at the invented Example Clinic (fictional); not a real measurement.",
}


def demo_metadata() -> dict[str, Any]:
    """Return a fresh copy of the demo metadata."""
    return dict(DEMO_METADATA)


#: The demo clinic's registers, in the order they are added: (kind, fields), where a reference to
#: another row is its key in this table ("@la1" is the row added under the key "la1"). Dates are
#: days before the demo runs, so a certificate never expires in the demo.
DEMO_REGISTERS: tuple[tuple[str, str, dict[str, Any]], ...] = (
    ("la1", "machine", {"name": "DEMO-LA1", "model": "invented linac"}),
    ("la2", "machine", {"name": "DEMO-LA2", "model": "invented linac"}),
    ("co1", "machine", {"name": "DEMO-CO1", "model": "invented cobalt unit"}),
    ("la1_6mv", "beam", {
        "machine": "@la1", "name": "6 MV", "modality": "photon", "nominal_energy": 6,
        "beam_type": "pulsed", "TPR20_10": 0.67, "quality_measured_on": -40,
        "phantom": "water", "depth_cm": 10, "setup": "SAD", "distance_cm": 100,
        "field_size_cm": 10, "expected_cGy_per_MU": 1.0, "tolerance_pct": 2.0,
        "action_pct": 3.0,
    }),
    ("la1_10mev", "beam", {
        "machine": "@la1", "name": "10 MeV", "modality": "electron", "nominal_energy": 10,
        "beam_type": "pulsed", "R50_cm": 4.2, "quality_measured_on": -40,
        "phantom": "water", "depth_cm": 2.42, "setup": "SSD", "distance_cm": 100,
        "field_size_cm": 20, "expected_cGy_per_MU": 1.0, "tolerance_pct": 2.0,
        "action_pct": 3.0,
    }),
    ("co1_co60", "beam", {
        "machine": "@co1", "name": "Co-60", "modality": "photon", "nominal_energy": 1.25,
        "beam_type": "continuous", "TPR20_10": 0.572, "quality_measured_on": -400,
        "phantom": "water", "depth_cm": 5, "setup": "SSD", "distance_cm": 80,
        "field_size_cm": 10, "tolerance_pct": 2.0, "action_pct": 3.0,
    }),
    ("ch1", "chamber", {
        "model": "thimble 0.6 cc", "serial": "SIM-CH-0001", "type": "cylindrical",
        "cavity_volume_cm3": 0.6,
    }),
    ("ch3", "chamber", {
        "model": "plane-parallel 0.35 cc", "serial": "SIM-CH-0003", "type": "plane-parallel",
        "cavity_volume_cm3": 0.35,
    }),
    ("cert1", "certificate", {
        "chamber": "@ch1", "N_Dw": 0.0504, "N_Dw_unit": "Gy/nC",
        "laboratory": "Example Calibration Laboratory (fictional)", "number": "SIM-CAL-0001",
        "date": -200, "U_pct": 1.1, "coverage_k": 2, "reference_quality": "Co-60",
    }),
    ("em1", "electrometer", {
        "model": "simulated electrometer", "serial": "SIM-EM-0001", "profile": "query-plain",
        "calibrated_with_chamber": True,
    }),
    # One simulated instrument reads both (the simulator's sensor, SIM-TP-0001): it reads
    # 0.10 °C low and 0.05 kPa high, which its certificate's corrections put right.
    ("th1", "thermometer", {
        "model": "simulated thermometer-barometer", "serial": "SIM-TP-0001",
        "profile": "sensor-plain", "certificate_date": -300, "u_C": 0.1, "correction_C": 0.1,
    }),
    ("ba1", "barometer", {
        "model": "simulated thermometer-barometer", "serial": "SIM-TP-0001",
        "profile": "sensor-plain", "certificate_date": -300, "u_kPa": 0.05,
        "correction_kPa": -0.05,
    }),
    ("kq_6mv", "k_Q", {
        "chamber": "@ch1", "beam": "@la1_6mv", "value": 0.992, "u_pct": 1.0,
        "source": "invented demo value, as read from the code of practice's table",
    }),
)  # fmt: skip


def add_demo_registers(store: Any, *, actor: str, today: Any = None) -> dict[str, int]:
    """Add the demo clinic's registers to ``store`` (a Store); return key -> row id."""
    import datetime

    from chargebook.acquire.session.register_rows import add_row

    day = today or datetime.datetime.now(datetime.UTC).date()
    ids: dict[str, int] = {}
    for key, kind, fields in DEMO_REGISTERS:
        given = {}
        for name, value in fields.items():
            if isinstance(value, str) and value.startswith("@"):
                value = ids[value[1:]]
            elif name.endswith(("date", "_on")):
                value = (day + datetime.timedelta(days=value)).isoformat()
            given[name] = value
        ids[key] = add_row(store, kind, given, actor=actor, today=day).id
    return ids


#: The register rows the demo's sessions use, by their keys in DEMO_REGISTERS.
DEMO_PICK = {
    "beam": "la1_6mv",
    "chamber": "ch1",
    "electrometer": "em1",
    "thermometer": "th1",
    "barometer": "ba1",
}


def demo_registers(store: Any, *, actor: str) -> dict[str, int]:
    """Return the ids of the register rows the demo uses (kind -> row id), adding the demo
    clinic's registers to ``store`` first when it holds none."""
    from chargebook.acquire.record.registers import register_rows

    if register_rows(store, "beam"):
        by_name = {
            (row.kind, row.fields.get("serial") or row.fields.get("name")): row
            for row in register_rows(store)
        }
        wanted = {key: (kind, fields) for key, kind, fields in DEMO_REGISTERS}
        found = {}
        for kind, key in DEMO_PICK.items():
            fields = wanted[key][1]
            row = by_name.get((kind, fields.get("serial") or fields.get("name")))
            if row is not None:
                found[kind] = row.id
        return found
    ids = add_demo_registers(store, actor=actor)
    return {kind: ids[key] for kind, key in DEMO_PICK.items()}
