"""End to end: `chargebook backup` copies a station file while the real daemon records readings.

The daemon runs on the simulator and an automatic operator keeps it measuring while the backup
(a subprocess, as typed) copies the file; everything committed before the backup started must be
in the copy, identical, and the copy must verify (`chargebook verify`, SQLite's quick check).
"""

from __future__ import annotations

import asyncio
import sqlite3
import subprocess

import pytest
from chargebook.acquire.commands.operator_auto import AutoOperator, environment_from_bench
from e2e_support import chargebook_command

pytestmark = pytest.mark.e2e

TABLES = ("sessions", "reading_sets", "readings", "environment", "events", "traffic")


def committed(path) -> dict[str, dict[int, tuple]]:
    """Return every committed row of the recorded tables, by table and id (status apart: a
    session or set may change status after the copy, as recorded in its events)."""
    conn = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
    try:
        found = {}
        for table in TABLES:
            cursor = conn.execute(f"SELECT * FROM {table}")
            names = [d[0] for d in cursor.description]
            keep = [i for i, n in enumerate(names) if n not in ("status", "reason", "closed_at")]
            keep = [i for i in keep if names[i] != "ended_at"]
            found[table] = {row[0]: tuple(row[i] for i in keep) for row in cursor.fetchall()}
        return found
    finally:
        conn.close()


async def run_chargebook(*args: str) -> tuple[int, str, str]:
    """Run `chargebook ARGS` without blocking the event loop (the operator keeps acting)."""
    process = await asyncio.create_subprocess_exec(
        *chargebook_command(*args), stdout=subprocess.PIPE, stderr=subprocess.PIPE
    )
    out, err = await asyncio.wait_for(process.communicate(), timeout=120)
    return process.returncode or 0, out.decode(), err.decode()


@pytest.mark.slow  # a session recorded while the copy is taken
async def test_a_backup_while_the_daemon_records_holds_everything_committed_before(
    daemon, simulator, metadata, tmp_path
):
    client = await daemon.connect()
    operator = AutoOperator(client, environment_from_bench(simulator.control))
    snapshot = await operator.start(metadata)
    snapshot = await operator.run_until(
        snapshot, lambda s: sum(len(e["readings"]) for e in s["sets"]) >= 2
    )
    measuring = asyncio.create_task(
        operator.run_until(snapshot, lambda s: s["state"] == "finished")
    )
    before = committed(daemon.db)  # the operator goes on measuring during the backup
    copy = tmp_path / "backup" / "station-copy.sqlite"
    copy.parent.mkdir()
    code, out, err = await run_chargebook("backup", "--db", str(daemon.db), str(copy))
    final = await measuring
    await client.close()
    assert code == 0, err
    assert "hash chain(s) verified" in out
    assert final["state"] == "finished"
    copied = committed(copy)
    after = committed(daemon.db)
    assert before["readings"] and len(after["readings"]) > len(before["readings"])
    for table in TABLES:
        assert before[table].items() <= copied[table].items(), table  # nothing committed lost
        assert copied[table].items() <= after[table].items(), table  # nothing invented
    code, out, _ = await run_chargebook("verify", "--db", str(copy))
    assert code == 0, out
    conn = sqlite3.connect(copy)
    assert conn.execute("PRAGMA quick_check").fetchall() == [("ok",)]
    assert conn.execute("PRAGMA journal_mode").fetchone() == ("delete",)  # one whole file
    conn.close()
    assert sorted(p.name for p in copy.parent.iterdir()) == [copy.name]  # no partial left
    code, _, err = await run_chargebook("backup", "--db", str(daemon.db), str(copy))
    assert code == 2 and "OUT" in err and "exists" in err and "--force" in err
    code, _, err = await run_chargebook("backup", "--db", str(daemon.db), str(copy), "--force")
    assert code == 0, err
    assert len(committed(copy)["readings"]) == len(committed(daemon.db)["readings"])
