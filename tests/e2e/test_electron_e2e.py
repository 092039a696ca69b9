"""End to end: an electron beam measured through the real daemon and simulated electrometer.

The session's metadata says modality electron with R50; the live results, `show` and the HTML
report carry R50 and z_ref = 0.6 R50 − 0.1 cm (IAEA TRS-398 (2000) and AAPM TG-51 (1999),
electron beams: 0.6 × 4.2 − 0.1 = 2.42 cm), and no photon wording reaches them.
"""

from __future__ import annotations

import json
import re
import subprocess

import pytest
from chargebook.acquire.client import DaemonError
from chargebook.acquire.commands.operator_auto import ACTOR, AutoOperator, environment_from_bench
from chargebook.acquire.record.store import Store
from e2e_support import chargebook_command

pytestmark = pytest.mark.e2e

#: An electron beam of the invented demo clinic (demo only, not reference data).
ELECTRON = {
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
#: Wording that describes a photon beam's quality (TPR20,10, %dd(10)x, "6 MV photons").
PHOTON = re.compile(r"TPR|%dd|dd\(10|photon|\d\s*MV\b", re.IGNORECASE)
SAYS = "R50 = 4.2 cm, z_ref = 2.42 cm"


def run(*args: str) -> str:
    done = subprocess.run(
        chargebook_command(*args), capture_output=True, text=True, timeout=120, check=False
    )
    assert done.returncode == 0, done.stderr
    return done.stdout


@pytest.mark.slow  # a whole session, show, export and a replay
async def test_an_electron_session_shows_R50_and_z_ref_and_no_photon_wording(
    daemon, simulator, metadata, tmp_path
):
    client = await daemon.connect(operator=ACTOR)
    environment = environment_from_bench(simulator.control)
    finished = await AutoOperator(client, environment).run({**metadata, **ELECTRON})
    await client.close()
    results = finished["results"]
    assert finished["session"]["status"] == "finished"
    assert (results["modality"], results["R50_cm"], results["beam_quality_text"]) == (
        "electron",
        4.2,
        SAYS,
    )
    assert results["z_ref_cm"] == pytest.approx(2.42, abs=1e-12)  # TRS-398 and TG-51 formula
    assert ELECTRON["k_Q_source"] in results["factor_sources"]["k_Q"]
    assert results["dose_Gy"] is not None
    with Store.open(daemon.db, read_only=True) as store:
        (session,) = store.sessions()
    shown = run("show", str(session.id), "--db", str(daemon.db))
    assert "Electron beam" in shown and f"{SAYS}; plane-parallel chamber" in shown
    assert PHOTON.search(shown) is None, PHOTON.search(shown)
    report = tmp_path / "report.html"
    run("export", str(session.id), "--db", str(daemon.db), "--format", "html", "-o", str(report))
    html = report.read_text(encoding="utf-8")
    assert SAYS in html
    assert PHOTON.search(html) is None, PHOTON.search(html)
    # A replay from the recorded traffic reproduces the electron session's results exactly.
    daemon.stop()
    replayed = run("replay", str(session.id), "--db", str(daemon.db), "--speed", "0", "--json")
    report = json.loads(replayed)
    assert report["reproduced"] is True and report["differences"] == []


async def test_an_electron_session_without_k_Q_source_is_refused_and_nothing_is_recorded(
    daemon, metadata
):
    client = await daemon.connect(operator=ACTOR)
    await client.subscribe()
    entered = {key: value for key, value in {**metadata, **ELECTRON}.items() if key != "k_Q_source"}
    with pytest.raises(DaemonError) as refused:
        await client.call("session.start", metadata=entered)
    await client.close()
    assert refused.value.field == "k_Q_source"
    assert "is missing for an electron beam" in refused.value.message
    with Store.open(daemon.db, read_only=True) as store:
        assert store.sessions() == []
