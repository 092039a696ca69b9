"""End to end: the registers through the real daemon (issue 14 item 1).

While `chargebook serve` holds the station file it is the single writer: `chargebook register
add` (a subprocess, as typed) goes through its socket, a console lists the rows with
``register.list``, and a session started with register row ids gets its metadata filled from
them and keeps their copy. Invented demo data (Example Clinic (fictional)).
"""

from __future__ import annotations

import getpass
import subprocess

import pytest
from chargebook.acquire import protocol
from chargebook.acquire.client import DaemonError
from chargebook.acquire.commands.demo_data import add_demo_registers
from chargebook.acquire.record.store import Store
from e2e_support import chargebook_command

pytestmark = pytest.mark.e2e


def register(daemon, *args: str) -> subprocess.CompletedProcess:
    command = chargebook_command(
        "register", *args, "--db", str(daemon.db), "--socket", str(daemon.socket)
    )
    return subprocess.run(command, capture_output=True, text=True, timeout=60, check=False)


async def test_rows_are_added_through_the_daemon_and_a_session_keeps_their_copy(
    start_daemon, simulator, tmp_path
):
    db = tmp_path / "station.sqlite"
    with Store.open(db) as store:
        ids = add_demo_registers(store, actor="physicist C")
    daemon = start_daemon(simulator, db)
    added = register(daemon, "add", "chamber", "serial=SIM-CH-0002", "type=cylindrical")
    assert added.returncode == 0, added.stderr
    assert "recorded by the daemon that holds" in added.stdout
    refused = register(daemon, "add", "k_Q", f"chamber={ids['ch1']}", f"beam={ids['la1_6mv']}",
                       "value=0.99", "u_pct=1")  # fmt: skip
    assert refused.returncode == 2 and "source is missing" in refused.stderr
    client = await daemon.connect(operator="operator A")
    listed = await client.call(protocol.Method.REGISTER_LIST, kind="chamber")
    assert [row["name"] for row in listed["rows"]] == ["SIM-CH-0001", "SIM-CH-0003", "SIM-CH-0002"]
    with pytest.raises(DaemonError) as wrong:
        await client.call(protocol.Method.REGISTER_ADD, kind="lamp", fields={})
    assert wrong.value.code == protocol.INVALID_PARAMS and wrong.value.field == "kind"
    names = {"beam": ids["la1_6mv"], "chamber": ids["ch1"], "electrometer": ids["em1"]}
    metadata = {"registers": names, "convention": "trs398", "operator": "operator A"}
    snapshot = await client.call(protocol.Method.SESSION_START, metadata=metadata)
    await client.close()
    with Store.open(db, read_only=True) as store:
        kept = store.session(snapshot["session"]["id"]).metadata()
        event = [e for e in store.events(None) if e.kind == "register_row"][-1]
    assert kept["treatment_machine"] == "DEMO-LA1" and kept["k_Q"] == 0.992
    assert kept["register_copy"]["certificate"]["fields"]["number"] == "SIM-CAL-0001"
    assert kept["register_warnings"] == []
    assert (
        event.account == getpass.getuser() and event.detail()["fields"]["serial"] == "SIM-CH-0002"
    )


def test_the_demo_picks_from_its_registers_then_a_monthly_check_carries_the_factors(tmp_path):
    """Issue 14 item 6: `chargebook demo` (no --plan) names its beam, chamber and certificate
    date from the invented clinic's registers, runs a full calibration, then a monthly check
    whose k_pol and k_s are carried from it; `history` of that register beam shows both."""
    import json

    from e2e_support import TIME_SCALE

    db = tmp_path / "demo.sqlite"
    command = chargebook_command(
        "demo", "--unattended", "--json", "--db", str(db), "--time-scale", str(TIME_SCALE)
    )
    done = subprocess.run(command, capture_output=True, text=True, timeout=240, check=False)
    assert done.returncode == 0, done.stderr
    assert "registers: beam DEMO-LA1 6 MV, chamber SIM-CH-0001 (certificate SIM-CAL-0001" in (
        done.stderr
    )
    flow = json.loads(done.stdout)
    full, check = flow["full_calibration"], flow["monthly_check"]
    assert full["factor_states"]["k_pol"] == full["factor_states"]["k_s"] == "measured"
    assert check["factor_states"]["k_pol"] == check["factor_states"]["k_s"] == "carried"
    assert (check["k_pol"], check["k_s"]) == (full["k_pol"], full["k_s"])
    assert f"session {full['session_id']} of " in check["factor_sources"]["k_pol"]
    assert check["dose_Gy"] is not None
    with Store.open(db, read_only=True) as store:
        kept = [session.metadata() for session in store.sessions()]
    assert [m["register_copy"]["beam"]["name"] for m in kept] == ["DEMO-LA1 6 MV"] * 2
    history = subprocess.run(
        chargebook_command("history", "--beam", "DEMO-LA1 6MV", "--json", "--db", str(db)),
        capture_output=True, text=True, timeout=60, check=True,
    )  # fmt: skip
    points = json.loads(history.stdout)["points"]
    assert [p["kind"] for p in points] == ["full calibration", "output check"]
    assert all(p["U_expanded_pct"] is not None for p in points)


async def test_the_daemon_reads_the_air_from_the_sensor_with_its_certificate_correction(
    start_daemon, simulator, tmp_path
):
    """Issue 14 item 4: with --sensor-port the daemon reads the simulated thermometer-barometer
    when the session starts and on demand; the registers' corrections for its serial bring it
    back to the bench's true air (the simulated sensor's own error, corrected); a typed entry
    stays possible and keeps its own source."""
    from e2e_support import QUICK_PLAN, TIME_SCALE

    db = tmp_path / "station.sqlite"
    with Store.open(db) as store:
        ids = add_demo_registers(store, actor="physicist C")
    sensor = ("--sensor-port", simulator.info["sensor"])
    daemon = start_daemon(simulator, db, QUICK_PLAN, True, TIME_SCALE, *sensor)
    with simulator.bench() as bench:
        bench.set_environment(temperature_C=23.0, pressure_kPa=99.2)
    client = await daemon.connect(operator="operator A")
    names = {"beam": ids["la1_6mv"], "chamber": ids["ch1"], "electrometer": ids["em1"]}
    metadata = {"registers": names, "convention": "trs398", "operator": "operator A"}
    started = await client.call(protocol.Method.SESSION_START, metadata=metadata)
    air = started["environment"]
    assert air["source"].startswith("sensor SIM-TP-0001 (sensor-plain): read +22.90 C, 992.5 hPa")
    assert "certificate corrections from the registers: +0.10 °C, -0.050 kPa" in air["source"]
    assert air["temperature_C"] == pytest.approx(23.0, abs=1e-9)  # the bench's true air
    assert air["pressure_kPa"] == pytest.approx(99.2, abs=1e-9)
    again = await client.call(protocol.Method.ENVIRONMENT_READ)
    assert again["environment"]["recorded_at"] > air["recorded_at"]
    typed = await client.call(
        protocol.Method.ENVIRONMENT_SET, temperature_C=22.0, pressure=100.0, source="typed"
    )
    assert typed["environment"]["source"] == "typed"
    await client.close()
    with Store.open(db, read_only=True) as store:
        sources = [entry.source for entry in store.environment(started["session"]["id"])]
    assert [s.split(" ")[0] for s in sources] == ["sensor", "sensor", "typed"]


async def test_reading_the_air_without_a_sensor_is_refused_by_name(daemon):
    client = await daemon.connect()
    with pytest.raises(DaemonError) as refused:
        await client.call(protocol.Method.ENVIRONMENT_READ)
    await client.close()
    assert refused.value.code == protocol.INPUT_ERROR and refused.value.field == "sensor"
