"""End to end: one daemon per station file and one per instrument port.

A second `chargebook serve` on a station file in use must be refused before it writes anything
(it used to mark the running set interrupted and log a false restart); a second daemon on a
port in use must not reach the instrument (its commands used to corrupt the first daemon's
reading) and must say why.
"""

from __future__ import annotations

import asyncio
import subprocess

import pytest
from chargebook.acquire.commands.operator_auto import AutoOperator, environment_from_bench
from chargebook.acquire.record.store import Store
from e2e_support import QUICK_PLAN, chargebook_command

pytestmark = pytest.mark.e2e


def _restart_traces(db) -> tuple[int, int]:
    """Return the interrupted sets and the events that speak of a restart, in ``db``."""
    with Store.open(db, read_only=True) as store:
        sql = store.db.execute
        interrupted = sql("SELECT count(*) FROM reading_sets WHERE status = 'interrupted'")
        restarts = sql("SELECT count(*) FROM events WHERE detail_json LIKE '%daemon restarted%'")
        return interrupted.fetchone()[0], restarts.fetchone()[0]


async def test_a_second_daemon_on_a_station_file_in_use_is_refused_before_it_writes(
    daemon, start_simulator, simulator, metadata, tmp_path
):
    client = await daemon.connect()
    operator = AutoOperator(client, environment_from_bench(simulator.control))
    snapshot = await operator.start(metadata)
    snapshot = await operator.run_until(snapshot, lambda s: s["state"] == "collecting")
    assert _restart_traces(daemon.db) == (0, 0)
    other = start_simulator(seed=2)
    command = chargebook_command(
        "serve", "--profile", other.profile, "--port", other.serial, "--plan", QUICK_PLAN,
        "--db", str(daemon.db), "--socket", str(tmp_path / "second" / "d.sock"),
    )  # fmt: skip
    done = subprocess.run(command, capture_output=True, text=True, timeout=60, check=False)
    assert done.returncode == 2
    assert "in use by another chargebook daemon" in done.stderr
    assert f"pid {daemon.pid}" in done.stderr
    assert done.stdout == ""  # it never announced itself ready
    assert _restart_traces(daemon.db) == (0, 0)  # nothing marked interrupted, no false restart
    status = await client.status()
    await client.close()
    assert status["state"] in ("collecting", "reviewing")  # the first daemon carries on


async def test_a_second_daemon_on_a_port_in_use_stays_off_the_instrument_and_says_why(
    daemon, start_daemon, simulator
):
    second = start_daemon(simulator)  # same pty, its own station file and socket
    client = await second.connect()
    try:
        for _ in range(100):
            status = await client.status()
            message = status["instrument"]["message"] or ""
            if "in use by another program" in message:
                break
            await asyncio.sleep(0.1)
        assert "in use by another program" in message
        assert simulator.serial in message  # names the port
        assert status["instrument"]["connected"] is False
    finally:
        await client.close()
    first = await daemon.connect()
    assert (await first.status())["instrument"]["connected"] is True
    await first.close()
