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
    assert wrong.value.code == protocol.INPUT_ERROR and wrong.value.field == "kind"
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
