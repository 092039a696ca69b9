"""End to end: a full calibration, then an output check that carries its k_pol and k_s.

The real daemon and the simulated electrometer on a pty, one station file (the refusal of another
chamber's factor, the engine's decision alone, runs the daemon in process on a hand clock:
tests/acquire/in_process_daemon.py). The check value is
an identity: the output check's k_pol and k_s are, bit for bit, those the full calibration
measured, and its dose is TRS-398's D = M · k_TP · k_h · k_pol · k_s · k_elec · N_D,w · k_Q
with them.
"""

from __future__ import annotations

import json
import subprocess
from pathlib import Path

import pytest
from chargebook.acquire.client import DaemonError
from chargebook.acquire.commands.operator_auto import ACTOR, AutoOperator, environment_from_bench
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import Store
from chargebook.acquire.session.evaluation import evaluate_session
from e2e_support import QUICK_PLAN, TIME_SCALE, chargebook_command

from tests.acquire.in_process_daemon import session_daemon

pytestmark = pytest.mark.e2e

QUICK_MONTHLY = str(Path(__file__).parent / "plans" / "quick-monthly.toml")


@pytest.mark.slow  # two whole sessions and a replay
async def test_an_output_check_carries_the_full_calibrations_factors_bit_for_bit(
    daemon, simulator, metadata
):
    client = await daemon.connect(operator=ACTOR)
    environment = environment_from_bench(simulator.control)
    full = (await AutoOperator(client, environment).run(metadata))["results"]
    check = await AutoOperator(client, environment).run(metadata, plan=QUICK_MONTHLY)
    await client.close()
    results = check["results"]
    assert check["session"]["status"] == "finished"
    assert results["factor_states"]["k_pol"] == results["factor_states"]["k_s"] == "carried"
    assert results["k_pol"] == full["k_pol"] and results["k_s"] == full["k_s"]
    with Store.open(daemon.db, read_only=True) as store:
        full_id, check_id = (row.id for row in store.sessions())
        date = store.session(full_id).created_at[:10]
        stored = evaluate_session(store, check_id).results()
        copied = store.session(check_id).metadata()["carried_k_pol"]
        events = [e.kind for e in store.events(check_id)]
    assert f"session {full_id} of {date}, full calibration" in results["factor_sources"]["k_pol"]
    assert results["carried"]["k_s"]["date"] == date
    assert copied["from_session"] == full_id and copied["value"] == full["k_pol"]
    assert EventKind.CARRIED_FACTORS in events
    # The Type A uncertainty of the full session's factor is carried with it (Type B here).
    assert results["carried"]["k_pol"]["u_pct"] == full["factor_u_rel_pct"]["k_pol"]
    # TRS-398: D = M · k_TP · k_h · k_pol · k_s · k_elec · N_D,w · k_Q (k_h = k_elec = 1 here).
    product = results["k_TP"] * results["k_h"] * full["k_pol"] * full["k_s"] * results["k_elec"]
    dose = abs(results["M_raw_nC"]) * product * results["N_Dw_Gy_per_nC"] * results["k_Q"]
    assert results["dose_Gy"] == pytest.approx(dose, rel=1e-12)
    # Live results and the stored record's one evaluation agree.
    assert stored["dose_Gy"] == results["dose_Gy"]
    assert stored["factor_sources"] == results["factor_sources"]
    # A replay of the output check reproduces it exactly, with the copied factors.
    daemon.stop()
    command = chargebook_command("replay", str(check_id), "--db", str(daemon.db), "--speed", "0")
    done = subprocess.run(
        [*command, "--json"], capture_output=True, text=True, timeout=120, check=False
    )
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout)
    assert report["reproduced"] is True and report["differences"] == []
    with Store.open(daemon.db, read_only=True) as store:
        replayed = evaluate_session(store, report["replay_session_id"]).results()
    assert replayed == stored


async def test_a_factor_from_another_chamber_is_refused_and_none_is_carried_from_one(
    tmp_path, metadata
):
    # The engine's and the daemon's decision only: the daemon in this process, on a hand clock.
    async with session_daemon(tmp_path) as daemon:
        client = await daemon.connect(operator=ACTOR)
        await client.subscribe()
        entered = dict(
            metadata,
            carried_k_pol={"value": 1.001, "source": "report", "date": "2026-03-02",
                           "chamber_serial": "SIM-CH-9999"},
        )  # fmt: skip
        with pytest.raises(DaemonError) as refused:
            await client.call("session.start", metadata=entered, plan=QUICK_MONTHLY)
        assert refused.value.field == "carried_k_pol.chamber_serial"
        assert "is from another chamber" in refused.value.message
        with Store.open(daemon.db, read_only=True) as store:
            assert store.sessions() == []  # nothing was started, nothing recorded is lost
        environment = daemon.bench.environment
        await AutoOperator(client, environment).run(dict(metadata, chamber_serial="SIM-CH-9999"))
        check = await AutoOperator(client, environment).run(metadata, plan=QUICK_MONTHLY)
        await client.close()
        # The only full calibration used another chamber: nothing is carried, the dose is pending.
        assert check["results"]["factor_states"]["k_pol"] == "pending"
        assert check["results"]["dose_Gy"] is None
        codes = [flag["code"] for flag in check["results"]["flags"]]
        assert "k_pol_not_measured" in codes and "k_s_not_measured" in codes


@pytest.mark.slow  # four demo runs, each a simulator and a daemon process
def test_demo_monthly_check_after_a_full_calibration_gives_a_dose_with_carried_factors(tmp_path):
    db = tmp_path / "demo.sqlite"

    def demo(plan: str, *more: str) -> subprocess.CompletedProcess[str]:
        command = chargebook_command(
            "demo", "--unattended", "--db", str(db), "--plan", plan,
            "--time-scale", str(TIME_SCALE), *more,
        )  # fmt: skip
        return subprocess.run(command, capture_output=True, text=True, timeout=120, check=False)

    nothing = demo("monthly-check", "--json")  # no full calibration yet: nothing to carry
    assert nothing.returncode == 0, nothing.stderr
    assert json.loads(nothing.stdout)["factor_states"]["k_pol"] == "pending"
    full = demo(QUICK_PLAN, "--json")
    assert full.returncode == 0, full.stderr
    check = demo("monthly-check", "--json")
    assert check.returncode == 0, check.stderr
    full_document, document = json.loads(full.stdout), json.loads(check.stdout)
    assert document["factor_states"]["k_pol"] == document["factor_states"]["k_s"] == "carried"
    assert (document["k_pol"], document["k_s"]) == (full_document["k_pol"], full_document["k_s"])
    source = f"session {full_document['session_id']} of "
    assert source in document["factor_sources"]["k_s"]
    assert document["dose_Gy"] is not None
    table = demo("monthly-check").stdout
    assert "k_pol carried: session" in table and "full calibration" in table
