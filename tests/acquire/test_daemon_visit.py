"""A calibration visit through the daemon's socket (issue 15 item 1): its real socket server,
engine and SQLite file in process, with no electrometer needed for the actions taken here.

The beams are the invented demo clinic's (Example Clinic (fictional), DEMO-LA1).
"""

from __future__ import annotations

from pathlib import Path

import pytest
from chargebook.acquire.client import DaemonClient, DaemonError
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.daemon.daemon import InstrumentLink
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.protocol import ILLEGAL_TRANSITION, INPUT_ERROR
from chargebook.drivers_generic import build_electrometer, load_profile

from tests.acquire.test_daemon_actions import daemon_on_file

OPERATOR = "operator A"


def _beam(name: str) -> dict:
    return {**demo_metadata(), "beam": name, "operator": OPERATOR}


async def test_a_visit_runs_through_the_daemon_and_its_review_is_refused_by_name(
    tmp_path: Path,
) -> None:
    daemon = daemon_on_file(tmp_path)
    profile = load_profile("query-plain")
    daemon.engine = Engine(daemon.store, capabilities=profile.capabilities)
    electrometer = build_electrometer(profile, port=str(tmp_path / "no-such-port"))
    daemon.link = InstrumentLink(electrometer, lambda kind, payload: None)  # never started
    await daemon.server.start()
    client = await DaemonClient.connect(daemon.options.socket_path, operator=OPERATOR)
    try:
        with pytest.raises(DaemonError) as refused:
            await client.call("visit.add_beam", metadata=_beam("6 MV"), plan="default")
        assert refused.value.code == ILLEGAL_TRANSITION
        shown = await client.call(
            "visit.start", machine="DEMO-LA1", metadata={"operator": OPERATOR}
        )
        assert shown["visit"]["machine"] == "DEMO-LA1"
        await client.call("visit.add_beam", metadata=_beam("6 MV"), plan="default")
        await client.call("visit.add_beam", metadata=_beam("9 MeV"), plan="monthly-check")
        with pytest.raises(DaemonError) as refused:
            await client.call("visit.add_beam", metadata=_beam("6 MV"), plan="monthly-check")
        assert (refused.value.code, refused.value.field) == (INPUT_ERROR, "beam")
        shown = await client.call("visit.start_beam", beam="6 MV")
        assert shown["session"]["id"] == shown["visit"]["beams"][0]["session"]
        assert shown["state"] == "waiting_for_operator"
        await client.call("session.abort", reason="monitor chamber fault", confirm=True)
        await client.call("session.close")
        await client.call("visit.skip_beam", beam="9 MeV", reason="electron applicator missing")
        shown = await client.call("visit.close", reason="machine fault")
        beams = shown["visit"]["beams"]
        assert [(b["status"], b["reason"]) for b in beams] == [
            ("unfinished", "monitor chamber fault"),
            ("skipped", "electron applicator missing"),
        ]
        review = {"visit": shown["visit"]["id"], "comment": "checked the audit"}
        with pytest.raises(DaemonError) as refused:
            await client.call("visit.review", decision="reject", reviewer=OPERATOR, **review)
        assert refused.value.field == "reviewer"
        with pytest.raises(DaemonError) as refused:
            await client.call("visit.review", decision="approve", reviewer="reviewer B", **review)
        assert refused.value.field == "decision"  # no beam was measured
        found = await client.call(
            "visit.review", decision="reject", reviewer="reviewer B", **review
        )
        assert found["status"] == "rejected"
        assert (await client.call("status"))["visit"]["review"]["reviewer"] == "reviewer B"
    finally:
        await client.close()
        await daemon.server.close()
        daemon.store.close()
