"""End to end: `chargebook publish` while the real daemon measures, into a real PostgreSQL.

The daemon runs on the simulator; an automatic operator finishes one session and keeps taking a
second while `chargebook publish` (a subprocess, as typed) copies the station file's closed
sessions into the department record. The publish must take the finished session only, the
daemon must go on measuring to the end of the second, and the next publish adds the second
(and, after the daemon stops, the event it records then).
"""

from __future__ import annotations

import asyncio
import json
import subprocess
from collections.abc import Iterator

import pytest
from chargebook.acquire.commands.operator_auto import ACTOR, AutoOperator, environment_from_bench
from e2e_support import chargebook_command

from tests.acquire.postgres_server import Server, running_server

pytestmark = [pytest.mark.e2e, pytest.mark.slow]


@pytest.fixture(scope="module")
def server() -> Iterator[Server]:
    with running_server() as running:
        yield running


async def run_chargebook(*args: str) -> tuple[int, str, str]:
    """Run `chargebook ARGS` without blocking the event loop (the operator keeps acting)."""
    process = await asyncio.create_subprocess_exec(
        *chargebook_command(*args), stdout=subprocess.PIPE, stderr=subprocess.PIPE
    )
    out, err = await asyncio.wait_for(process.communicate(), timeout=120)
    return process.returncode or 0, out.decode(), err.decode()


async def test_publish_while_the_daemon_measures_takes_the_closed_sessions_only(
    daemon, simulator, metadata, server: Server
):
    url = server.new_database("measuring")
    client = await daemon.connect(operator=ACTOR)
    operator = AutoOperator(client, environment_from_bench(simulator.control))
    first = await operator.run(metadata)
    snapshot = await operator.start(metadata)
    snapshot = await operator.run_until(
        snapshot, lambda s: sum(len(e["readings"]) for e in s["sets"]) >= 2
    )
    measuring = asyncio.create_task(
        operator.run_until(snapshot, lambda s: s["state"] == "finished")
    )
    code, out, err = await run_chargebook(
        "publish", "--db", str(daemon.db), "--to", url, "--create-schema"
    )
    second = await measuring
    await client.close()
    assert code == 0, err
    assert "published 1 session(s)" in out and "1 not closed yet" in out
    assert first["state"] == second["state"] == "finished"
    code, out, err = await run_chargebook("publish", "--db", str(daemon.db), "--to", url)
    assert code == 0, err
    assert "published 1 session(s)" in out and "1 already there" in out
    code, out, err = await run_chargebook("sessions", "--db", url, "--json")
    assert code == 0, err
    listed = [(row["id"], row["status"]) for row in json.loads(out)]
    assert listed == [(1, "finished"), (2, "finished")]
    daemon.stop()  # the daemon records its stop in the last session: a row past the published
    code, out, err = await run_chargebook("publish", "--db", str(daemon.db), "--to", url)
    assert code == 0, err
    assert "published 1 session(s)" in out and ": 1 rows;" in out
    code, from_file, _ = await run_chargebook("show", "2", "--db", str(daemon.db))
    code_pg, from_department, _ = await run_chargebook("show", "2", "--db", url)
    assert code == code_pg == 0
    assert from_department == from_file
