"""The demo's calibration visit (issue 15 item 5), tried as a new user would.

`chargebook demo --unattended` (no --plan) measures three beams of the invented DEMO-LA1
(Example Clinic (fictional)): 6 MV and 10 MeV full calibrations and a 10 MV output check
whose k_pol and k_s are carried; a second person approves the visit with `chargebook review
--visit`; its report prints (headless Chromium, read back with pdftotext) with the result on
page 1 and the visit id on every page. Check values: the simulator's own truth (its bench).
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest
from chargebook.acquire.record import visits
from chargebook.acquire.record.store import Store
from e2e_support import TIME_SCALE, chargebook_command

pytestmark = pytest.mark.e2e
#: The session report's print check (tests/acquire/test_report_print.py) is reused here.
sys.path.insert(0, str(Path(__file__).parents[1] / "acquire"))

#: Tolerance on k_pol against the simulator's truth: the set means' noise (as the other demo
#: test, tests/e2e/test_daemon_e2e.py).
K_POL_TOLERANCE = 0.002


def run(*args: str, timeout: float = 120) -> subprocess.CompletedProcess:
    return subprocess.run(
        chargebook_command(*args), capture_output=True, text=True, timeout=timeout, check=False
    )


@pytest.mark.slow
@pytest.mark.timeout(600)  # three beams' sessions, a review and a print
def test_the_demo_measures_a_visit_of_three_beams_that_a_second_person_approves(
    tmp_path: Path,
) -> None:
    from test_report_print import printed_pages

    db = tmp_path / "demo.sqlite"
    done = run(
        "demo", "--unattended", "--json", "--db", str(db), "--time-scale", str(TIME_SCALE),
        "--seed", "4", timeout=400,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr
    visit = json.loads(done.stdout)
    beams = visit["beams"]
    assert [(b["name"], b["plan"], b["status"]) for b in beams] == [
        ("6 MV", "default", "measured"),
        ("10 MV", "monthly-check", "measured"),
        ("10 MeV", "default", "measured"),
    ]
    assert all(b["dose_per_MU_cGy"] is not None and b["verdict"] == "pass" for b in beams)
    with Store.open(db, read_only=True) as store:
        sessions = {s.beam: s for s in store.sessions()}
        check = sessions["10 MV"].metadata()
        electron = sessions["10 MeV"].metadata()
        # The beam's first air entry; the demo daemon's sensor reads the air again before
        # each set (its entries follow).
        air = store.environment(sessions["10 MV"].id)[0]
        photon = sessions["6 MV"].metadata()
        beam_rows = visits.beams(store, visit["id"])
    # The 6 MV beam names the demo clinic's register rows; its session was filled from them.
    assert beam_rows[0].register_ids()["beam"] == photon["registers"]["beam"]
    assert photon["register_copy"]["beam"]["name"] == "DEMO-LA1 6 MV"
    assert beam_rows[1].register_ids() == {}
    # The output check's k_pol is carried (the demo enters the simulator's true value).
    assert check["carried_k_pol"]["value"] == pytest.approx(
        visit["truth"]["k_pol"], abs=K_POL_TOLERANCE
    )
    assert beams[1]["mu_per_reading"] == 100.0  # monthly-check's MU per reading
    shown = run("show", "--visit", str(visit["id"]), "--db", str(db)).stdout
    check_factors = shown[shown.index("Beam 2, 10 MV") :]
    assert re.search(r"^k_pol\s+\S+\s+carried\s", check_factors, re.M)
    assert electron["modality"] == "electron"
    assert air.source.startswith("confirmed: read at")  # carried only as a confirmation

    reviewed = run(
        "review", "--visit", str(visit["id"]), "--approve", "--reviewer", "reviewer B",
        "--comment", "three beams within tolerance", "--db", str(db),
    )  # fmt: skip
    assert reviewed.returncode == 0, reviewed.stderr
    assert f"visit {visit['id']} approved by reviewer B" in reviewed.stdout

    report = tmp_path / "visit.html"
    exported = run(
        "export", "--visit", str(visit["id"]), "--format", "html", "-o", str(report),
        "--db", str(db),
    )  # fmt: skip
    assert exported.returncode == 0, exported.stderr
    pages = printed_pages(report.read_text(), tmp_path, "A4", f"chargebook visit {visit['id']} ")
    assert f"{beams[0]['dose_per_MU_cGy']:.4f}" in pages[0] and "PASS" in pages[0]
    assert "reviewer B" in pages[-1]
