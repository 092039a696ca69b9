"""The daemon client's handling of ``delta`` notifications, against a scripted peer on a real Unix
socket: it answers hello, subscribe and status as the daemon does and sends the deltas a test
chooses, among them one whose base the client never had (a delta it missed)."""

from __future__ import annotations

import asyncio
import json
from pathlib import Path

from chargebook.acquire.client import DaemonClient
from chargebook.acquire.protocol import NOTIFY_DELTA, NOTIFY_SNAPSHOT, notification


def _snapshot(seq: int, state: str) -> dict:
    return {"seq": seq, "state": state, "sets": [], "prompt": {"kind": "arm", "text": "Arm."}}


def _delta(base_seq: int, seq: int, state: str) -> dict:
    return {"seq": seq, "base_seq": base_seq, "changed": {"state": state}, "sets": []}


async def test_a_missed_delta_makes_the_client_ask_for_the_whole_snapshot_and_go_on(
    tmp_path: Path,
) -> None:
    asked: list[str] = []

    async def serve(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        def send(message: dict) -> None:
            writer.write(json.dumps(message).encode() + b"\n")

        while line := await reader.readline():
            request = json.loads(line)
            asked.append(request["method"])
            results = {
                "hello": {"protocol_version": "1.0"},
                "subscribe": _snapshot(1, "waiting_for_operator"),
                "status": _snapshot(6, "reviewing"),
            }
            send({"jsonrpc": "2.0", "id": request["id"], "result": results[request["method"]]})
            if request["method"] == "subscribe":
                send(notification(NOTIFY_DELTA, _delta(1, 2, "settling")))
                send(notification(NOTIFY_DELTA, _delta(4, 5, "collecting")))  # 3 and 4 missed
                send(notification(NOTIFY_DELTA, _delta(5, 6, "reviewing")))  # ignored meanwhile
            if request["method"] == "status":
                send(notification(NOTIFY_DELTA, _delta(5, 6, "reviewing")))  # already held
                send(notification(NOTIFY_DELTA, _delta(6, 7, "waiting_for_operator")))

    server = await asyncio.start_unix_server(serve, path=str(tmp_path / "daemon.sock"))
    client = await DaemonClient.connect(tmp_path / "daemon.sock")
    notes: list = []
    client.add_listener(notes.append)
    try:
        await client.subscribe()
        latest = await client.wait_for_snapshot(lambda s: s["seq"] == 7, 10)
    finally:
        await client.close()
        server.close()
    assert asked == ["hello", "subscribe", "status"]
    assert latest == _snapshot(7, "waiting_for_operator")
    assert [(n.method, n.params["seq"], n.params["state"]) for n in notes] == [
        (NOTIFY_SNAPSHOT, 2, "settling"),
        (NOTIFY_SNAPSHOT, 6, "reviewing"),
        (NOTIFY_SNAPSHOT, 7, "waiting_for_operator"),
    ]
