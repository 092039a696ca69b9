"""End to end: the real daemon process, its real socket, the simulated electrometer on a pty.

What only processes can show: a kill -9 and a restart, the audit of how each run ended, the
`run --unattended`, `demo --unattended` and `serve` commands as a user types them. Sessions
whose logic is the engine's and the daemon's run in process on a hand clock
(``tests/acquire/test_daemon_session.py``, the same checks and tolerances). Check values come
from the simulator (an independent implementation of the physics, drivers_generic), and the
factor definitions from TRS-398 as written in docs/physics.md.
"""

from __future__ import annotations

import json
import subprocess

import pytest
from chargebook.acquire.commands.operator_auto import AutoOperator, environment_from_bench
from chargebook.acquire.record.events import EventKind
from e2e_support import QUICK_PLAN, TIME_SCALE, chargebook_command

from tests.acquire.test_daemon_session import (
    K_POL_TOLERANCE,
    K_S_TOLERANCE,
    K_TP_TOLERANCE,
    collecting_with,
    stored,
)

pytestmark = pytest.mark.e2e


def bench_environment(simulator):
    return environment_from_bench(simulator.control)


@pytest.mark.slow
async def test_kill_9_mid_set_loses_no_committed_reading_and_the_session_resumes(
    daemon, simulator, metadata
):
    client = await daemon.connect()
    operator = AutoOperator(client, bench_environment(simulator))
    snapshot = await operator.start(metadata)
    snapshot = await operator.run_until(snapshot, collecting_with(2))
    announced = {r["id"] for s in snapshot["sets"] for r in s["readings"]}
    daemon.kill9()
    await client.close()
    with stored(daemon.db) as store:
        session_id = snapshot["session"]["id"]
        on_disk = {r.id for r in store.readings(session_id)}
    assert announced <= on_disk  # every reading a client heard of was committed
    daemon.restart()
    assert daemon.info["resumed_session"] == session_id
    client = await daemon.connect()
    resumed = await client.subscribe()
    assert resumed["state"] == "interrupted"
    assert resumed["current_set"]["status"] == "interrupted"
    assert {r["id"] for s in resumed["sets"] for r in s["readings"]} == on_disk
    final = await AutoOperator(client, bench_environment(simulator)).run(metadata, take_over=True)
    await client.close()
    assert final["state"] == "finished" and final["session"]["id"] == session_id
    with stored(daemon.db) as store:
        assert on_disk <= {r.id for r in store.readings(session_id)}


async def test_the_audit_tells_a_clean_stop_from_a_crash(daemon, simulator, metadata):
    # A SIGTERM is recorded as daemon_stopped with its reason; each start says how the previous
    # run ended: "stopped cleanly" after a daemon_stopped, "crashed" after a kill -9.
    client = await daemon.connect()
    snapshot = await AutoOperator(client, bench_environment(simulator)).start(metadata)
    await client.close()
    session_id = snapshot["session"]["id"]
    first_pid = daemon.pid
    daemon.stop()  # SIGTERM
    daemon.restart()
    second_pid = daemon.pid
    daemon.kill9()
    daemon.restart()
    with stored(daemon.db) as store:
        lifecycle = [
            (e.kind, e.detail())
            for e in store.events(session_id)
            if e.kind in (EventKind.DAEMON_STOPPED, EventKind.DAEMON_RESTARTED)
        ]
        (started,) = [e.detail() for e in store.events(None) if e.kind == EventKind.DAEMON_STARTED]
    assert started["pid"] == first_pid
    assert lifecycle == [
        (EventKind.DAEMON_STOPPED, {"pid": first_pid, "reason": "SIGTERM"}),
        (
            EventKind.DAEMON_RESTARTED,
            {
                "pid": second_pid,
                "previous_run": "stopped cleanly",
                "previous_stop": "SIGTERM",
                "previous_pid": first_pid,
            },
        ),
        (
            EventKind.DAEMON_RESTARTED,
            {
                "pid": daemon.pid,
                "previous_run": "crashed",
                "previous_stop": None,
                "previous_pid": second_pid,
            },
        ),
    ]


@pytest.mark.slow
def test_run_unattended_prints_the_worksheet_keys_plus_the_session_id(
    simulator, tmp_path, metadata
):
    command = chargebook_command(
        "run", "--unattended", "--json", "--profile", simulator.profile,
        "--port", simulator.serial, "--bench-control", simulator.control,
        "--db", str(tmp_path / "run.sqlite"), "--plan", QUICK_PLAN,
        "--time-scale", str(TIME_SCALE),
        "--temperature-C", "21.5", "--pressure-hPa", "1008.0",  # a barometer reading in hPa
    )  # fmt: skip
    done = subprocess.run(command, capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode == 0, done.stderr
    document = json.loads(done.stdout)
    with stored(tmp_path / "run.sqlite") as store:
        (entry,) = store.environment(document["session_id"])
    assert (entry.pressure_entered, entry.pressure_unit) == (1008.0, "hPa")
    assert entry.pressure_kPa == pytest.approx(100.8, rel=1e-12)  # 1 hPa = 0.1 kPa (SI)
    # TRS-398 (2000) air-density correction at 21.5 °C, 100.8 kPa to 20 °C, 101.325 kPa
    assert document["k_TP"] == pytest.approx((273.2 + 21.5) / 293.2 * 101.325 / 100.8, rel=1e-9)
    worksheet_keys = {
        "k_TP", "k_h", "k_pol", "k_s", "k_elec", "M_raw_nC", "M_corrected_nC", "dose_Gy",
        "dose_per_MU_cGy", "deviation_pct", "u_combined_pct", "U_expanded_pct", "flags",
        "factor_states", "symbols", "budget", "monte_carlo", "caution",
    }  # fmt: skip
    assert worksheet_keys | {"session_id"} <= set(document)
    with stored(tmp_path / "run.sqlite") as store:
        assert store.session(document["session_id"]).status == "finished"
    with simulator.bench() as bench:
        truth = bench.truth()
    assert document["k_pol"] == pytest.approx(truth["k_pol"], abs=K_POL_TOLERANCE)


@pytest.mark.slow
def test_demo_unattended_prints_a_dose_whose_factors_match_the_simulators_truth(tmp_path):
    db = tmp_path / "demo.sqlite"
    command = chargebook_command(
        "demo", "--unattended", "--db", str(db), "--plan", QUICK_PLAN,
        "--time-scale", str(TIME_SCALE), "--seed", "3",
    )  # fmt: skip
    done = subprocess.run(command, capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode == 0, done.stderr
    text = done.stdout
    assert f"demo database: {db}" in text
    assert "simulator truth" in text and "dose to water" in text and "M corrected" in text
    assert "qualified medical physicist" in text  # the safety caution
    assert text.count(" nC  auto") >= 10  # one progress line per reading
    done = subprocess.run(
        [*command, "--json"], capture_output=True, text=True, timeout=120, check=False
    )
    assert done.returncode == 0, done.stderr
    document = json.loads(done.stdout)
    truth = document["truth"]
    assert document["k_TP"] == pytest.approx(truth["k_TP"], abs=K_TP_TOLERANCE)
    assert document["k_pol"] == pytest.approx(truth["k_pol"], abs=K_POL_TOLERANCE)
    assert document["k_s"] == pytest.approx(truth["k_s"], abs=K_S_TOLERANCE)
    assert document["dose_Gy"] is not None and document["M_corrected_nC"] is not None
    with stored(db) as store:
        assert [s.status for s in store.sessions()] == ["finished", "finished"]


@pytest.mark.parametrize(
    ("options", "named"),
    [
        (["--plan", "no-such-plan"], "plan"),
        (["--time-scale", "0"], "--time-scale"),
        (["--thresholds", "THRESHOLDS"], "thresholds.relative_sd"),
        (["--profile", "no-such-profile"], "no-such-profile"),
    ],
)
def test_serve_refuses_bad_options_naming_them(simulator, tmp_path, options, named):
    thresholds = tmp_path / "thresholds.toml"
    thresholds.write_text("relative_sd = 0.1\n")  # the field is relative_sd_pct
    options = [str(thresholds) if o == "THRESHOLDS" else o for o in options]
    command = chargebook_command(
        "serve", "--profile", simulator.profile, "--port", simulator.serial,
        "--db", str(tmp_path / "s.sqlite"), "--socket", str(tmp_path / "run" / "d.sock"),
        *options,
    )  # fmt: skip
    done = subprocess.run(command, capture_output=True, text=True, timeout=60, check=False)
    assert done.returncode == 2
    assert named in done.stderr and done.stdout == ""
