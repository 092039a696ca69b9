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
