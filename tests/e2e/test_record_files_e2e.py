"""End to end: the daemon notices its -wal file deleted under it, and stops taking readings.

Deleting ``station.sqlite-wal`` while the daemon runs used to go unnoticed; after a kill -9 the
whole session was gone, readings included. The daemon now checks its files once a second: the
session is put in the condition "record not writable: the -wal file ... was deleted or
replaced", no action is taken (in words), and what was committed is copied into the database
file, so a kill -9 afterwards loses nothing that had been recorded.
"""

from __future__ import annotations

import asyncio

import pytest
from chargebook.acquire.client import DaemonError
from chargebook.acquire.commands.operator_auto import AutoOperator, environment_from_bench
from chargebook.acquire.protocol import Method
from chargebook.acquire.record.store import Store

pytestmark = pytest.mark.e2e


async def test_a_deleted_wal_file_stops_the_readings_and_keeps_what_was_recorded(
    daemon, simulator, metadata
):
    client = await daemon.connect()
    operator = AutoOperator(client, environment_from_bench(simulator.control))
    snapshot = await operator.start(metadata)
    snapshot = await operator.run_until(snapshot, lambda s: s["state"] == "reviewing")
    session_id = snapshot["session"]["id"]
    readings = {r["id"] for s in snapshot["sets"] for r in s["readings"]}
    assert readings
    wal = daemon.db.with_name(daemon.db.name + "-wal")
    wal.unlink()
    for _ in range(100):
        status = await client.status()
        if status["record"]["message"]:
            break
        await asyncio.sleep(0.1)
    message = status["record"]["message"]
    assert message.startswith("record not writable: the -wal file")
    assert "deleted or replaced" in message
    assert status["record"]["writable"] is False
    assert status["allowed"] == []
    assert "Do not deliver beam" in status["prompt"]["text"]
    with pytest.raises(DaemonError, match="record not writable"):
        await client.call(Method.SET_ACCEPT)
    await client.close()
    daemon.kill9()
    with Store.open(daemon.db, read_only=True) as store:
        kept = {r.id for r in store.readings(session_id)}
    assert readings <= kept  # committed before the deletion, still there after kill -9
