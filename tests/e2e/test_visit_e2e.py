"""A calibration visit through the real daemon process (issue 15 item 1): it stays open across
a crash of the daemon, like a session, and the beam being measured is resumed with it.

The beams are the invented demo clinic's (Example Clinic (fictional), DEMO-LA1).
"""

from __future__ import annotations

import subprocess

import pytest
from chargebook.acquire.record.store import Store
from chargebook.acquire.record.verify import verify_all
from e2e_support import chargebook_command

pytestmark = pytest.mark.e2e

OPERATOR = "operator A"


def run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        chargebook_command(*args), capture_output=True, text=True, timeout=60, check=False
    )


async def test_an_open_visit_and_its_beam_survive_a_killed_daemon(daemon, metadata) -> None:
    client = await daemon.connect(operator=OPERATOR)
    try:
        await client.call("visit.start", machine="DEMO-LA1", metadata={"operator": OPERATOR})
        await client.call("visit.add_beam", metadata={**metadata, "beam": "6 MV"})
        await client.call("visit.add_beam", metadata={**metadata, "beam": "10 MV"})
        started = await client.call("visit.start_beam", beam="6 MV")
    finally:
        await client.close()
    session_id = started["session"]["id"]
    daemon.kill9()
    daemon.start()
    assert daemon.info["resumed_visit"] == started["visit"]["id"]
    assert daemon.info["resumed_session"] == session_id
    client = await daemon.connect(operator=OPERATOR)
    try:
        status = await client.call("status")
        beams = status["visit"]["beams"]
        assert [(b["name"], b["status"]) for b in beams] == [
            ("6 MV", "measuring"),
            ("10 MV", "planned"),
        ]
        assert status["session"]["id"] == session_id
        await client.call("session.abort", reason="end of the test", confirm=True)
        await client.call("session.close")
        closed = await client.call("visit.close", reason="the crash test is over")
    finally:
        await client.close()
    assert closed["visit"]["status"] == "closed"
    # A second person reviews it while the daemon holds the file: through its socket.
    review = ["review", "--visit", str(closed["visit"]["id"]), "--comment", "checked"]
    where = ["--db", str(daemon.db), "--socket", str(daemon.socket)]
    refused = run(*review, "--approve", "--reviewer", "reviewer B", *where)
    assert refused.returncode == 2  # no beam was measured: a rejection only
    assert "cannot approve visit" in refused.stderr
    done = run(*review, "--reject", "--reviewer", "reviewer B", *where)
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("visit 1 rejected by reviewer B on ")
    assert "recorded by the daemon that holds" in done.stdout
    daemon.stop()
    with Store.open(daemon.db, read_only=True) as store:
        assert all(report.verified for report in verify_all(store))
