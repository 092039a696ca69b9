"""End to end: a review goes through the real daemon that holds the station file.

The daemon (``chargebook serve`` on the simulator) is the single writer of its file, so
``chargebook review`` (a subprocess, as typed) must ask it over its socket, and the daemon
records the reviewer's name with the Unix account of the connection. The metadata is the
invented demo clinic's ("demo operator" measured).
"""

from __future__ import annotations

import getpass
import subprocess

import pytest
from chargebook.acquire import protocol
from chargebook.acquire.client import DaemonError
from chargebook.acquire.commands.operator_auto import AutoOperator, environment_from_bench
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import Store
from e2e_support import chargebook_command

pytestmark = pytest.mark.e2e

REVIEWER = "reviewer B"


def review(daemon, session_id: int, decision: str, reviewer: str) -> subprocess.CompletedProcess:
    """Run `chargebook review` as a user would, on the daemon's file and socket."""
    command = chargebook_command(
        "review", str(session_id), f"--{decision}", "--reviewer", reviewer,
        "--comment", "checked", "--db", str(daemon.db), "--socket", str(daemon.socket),
    )  # fmt: skip
    return subprocess.run(command, capture_output=True, text=True, timeout=60, check=False)


def rows(db) -> tuple[int, int, int]:
    """Return how many events, readings and sets the file holds."""
    with Store.open(db, read_only=True) as store:
        count = store.db.execute
        return tuple(  # type: ignore[return-value]
            count(f"SELECT count(*) FROM {t}").fetchone()[0]
            for t in ("events", "readings", "reading_sets")
        )


@pytest.mark.slow  # a whole session, then reviews
async def test_a_review_goes_through_the_daemon_with_the_reviewer_and_the_account(
    daemon, simulator, metadata
):
    client = await daemon.connect()
    operator = AutoOperator(client, environment_from_bench(simulator.control))
    snapshot = await operator.start(metadata)
    session_id = snapshot["session"]["id"]
    refused = review(daemon, session_id, "approve", REVIEWER)
    assert refused.returncode == 2
    assert "is open: a session is reviewed once it is closed" in refused.stderr
    final = await operator.run_until(snapshot, lambda s: s["state"] == "finished")
    before = rows(daemon.db)
    measurer = review(daemon, session_id, "approve", metadata["operator"].upper())
    assert measurer.returncode == 2 and "measured this session" in measurer.stderr
    assert rows(daemon.db) == before  # nothing written on a refusal
    done = review(daemon, session_id, "approve", REVIEWER)
    assert done.returncode == 0, done.stderr
    assert "recorded by the daemon that holds" in done.stdout
    status = await client.status()
    assert status["state"] == final["state"] == "finished"  # the daemon carried on
    await client.close()
    with Store.open(daemon.db, read_only=True) as store:
        event = store.events(session_id)[-1]
    expected = (EventKind.SESSION_REVIEWED, REVIEWER, getpass.getuser())
    assert (event.kind, event.actor, event.account) == expected
    verified = subprocess.run(
        chargebook_command("verify", "--db", str(daemon.db)),
        capture_output=True, text=True, timeout=60, check=False,
    )  # fmt: skip
    assert verified.returncode == 0, verified.stdout
    shown = subprocess.run(
        chargebook_command("sessions", "--db", str(daemon.db)),
        capture_output=True, text=True, timeout=60, check=True,
    )  # fmt: skip
    assert f"approved by {REVIEWER}" in shown.stdout


async def test_the_daemon_refuses_approving_an_aborted_session_and_another_file(
    daemon, simulator, metadata, tmp_path
):
    client = await daemon.connect()
    snapshot = await AutoOperator(client, environment_from_bench(simulator.control)).start(metadata)
    session_id = snapshot["session"]["id"]
    await client.call("session.abort", reason="phantom moved", confirm=True)
    params = {"session": session_id, "reviewer": REVIEWER, "comment": "no"}
    with pytest.raises(DaemonError) as refused:
        await client.call(protocol.Method.SESSION_REVIEW, decision="approve", **params)
    assert refused.value.code == protocol.INPUT_ERROR and refused.value.field == "decision"
    with pytest.raises(DaemonError) as other:
        await client.call(
            protocol.Method.SESSION_REVIEW,
            decision="reject",
            db=str(tmp_path / "another.sqlite"),
            **params,
        )
    assert other.value.field == "db"
    with pytest.raises(DaemonError) as missing:
        await client.call(protocol.Method.SESSION_REVIEW, decision="reject", session=session_id)
    assert missing.value.code == protocol.INVALID_PARAMS and missing.value.field == "reviewer"
    result = await client.call(protocol.Method.SESSION_REVIEW, decision="reject", **params)
    await client.close()
    assert (result["status"], result["reviewer"]) == ("rejected", REVIEWER)


def test_serve_names_the_station_in_its_file(simulator, tmp_path):
    from e2e_support import DaemonProcess

    db = tmp_path / "named.sqlite"
    args = ["serve", "--profile", simulator.profile, "--port", simulator.serial, "--db", str(db)]
    args += ["--socket", str(tmp_path / "named" / "d.sock"), "--station-name", "Physics bench 2"]
    daemon = DaemonProcess(args, tmp_path / "named" / "d.sock", db, tmp_path / "named.log")
    try:
        daemon.start()
    finally:
        daemon.stop()
    with Store.open(db, read_only=True) as store:
        assert store.station().name == "Physics bench 2"
        assert [e.kind for e in store.events(None)].count(EventKind.STATION_NAMED) == 1
