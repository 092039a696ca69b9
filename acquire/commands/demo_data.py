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


#: The demo clinic's electron beam (a plane-parallel chamber); demo only, not reference data.
DEMO_ELECTRON: dict[str, Any] = {
    "beam": "10 MeV",
    "modality": "electron",
    "R50_cm": 4.2,
    "chamber_type": "plane-parallel",
    "chamber_model": "plane-parallel 0.35 cc",
    "chamber_serial": "SIM-CH-0003",
    "k_Q": 0.91,
    "k_Q_source": "own determination against the station's reference chamber",
    "beam_quality": "10 MeV electrons",
}

#: The demo visit's beams of DEMO-LA1, in the order the demo measures them: (changes to the
#: demo metadata, plan). Beam 2 is an output check whose k_pol and k_s are carried.
DEMO_VISIT_BEAMS: tuple[tuple[dict[str, Any], str], ...] = (
    ({"beam": "6 MV"}, "default"),
    ({"beam": "10 MV", "k_Q": 0.985}, "monthly-check"),
    ({**DEMO_ELECTRON, "expected_cGy_per_MU": 0.92}, "default"),
)
#: Where the demo's output check says its carried factors come from (invented).
DEMO_CARRIED_SOURCE = "annual calibration of DEMO-LA1 10 MV at Example Clinic (fictional)"
#: How many days before the demo that invented calibration took place.
DEMO_CARRIED_AGE_DAYS = 30


def demo_visit_beams(truth: dict[str, Any], today: str) -> list[tuple[dict[str, Any], str]]:
    """Return the demo visit's beams: (session metadata, plan), in the order measured.

    The output check's carried k_pol and k_s are the simulated chamber's true ones (``truth``,
    the simulator's ``truth`` reply), said to come from an invented annual calibration
    :data:`DEMO_CARRIED_AGE_DAYS` before ``today`` (YYYY-MM-DD): demo only.
    """
    import datetime

    day = datetime.date.fromisoformat(today) - datetime.timedelta(days=DEMO_CARRIED_AGE_DAYS)
    beams = []
    for changes, plan in DEMO_VISIT_BEAMS:
        metadata = {**demo_metadata(), **changes}
        if plan == "monthly-check":
            for key in ("k_pol", "k_s"):
                metadata[f"carried_{key}"] = {
                    "value": round(float(truth[key]), 4),
                    "source": DEMO_CARRIED_SOURCE,
                    "date": day.isoformat(),
                    "u_pct": 0.1,
                    "u_source": "the invented calibration's Type A uncertainty (demo only)",
                }
        beams.append((metadata, plan))
    return beams
