"""The daemon client's handling of ``delta`` notifications, against a scripted peer on a real Unix
socket: it answers hello, subscribe and status as the daemon does and sends the deltas a test
chooses, among them one whose base the client never had (a delta it missed)."""

from __future__ import annotations

import asyncio
import json
from pathlib import Path

from chargebook.acquire.client import DaemonClient, Notification
from chargebook.acquire.protocol import NOTIFY_DELTA, NOTIFY_SNAPSHOT, notification


def _snapshot(seq: int, state: str) -> dict:
    return {"seq": seq, "state": state, "sets": [], "prompt": {"kind": "arm", "text": "Arm."}}


def _delta(base_seq: int, seq: int, state: str) -> dict:
    return {"seq": seq, "base_seq": base_seq, "changed": {"state": state}, "sets": []}


async def follow_peer(
    socket: Path, results: dict[str, dict], deltas_after: dict[str, list[dict]], last_seq: int
) -> tuple[list[str], list[Notification], dict]:
    """Serve a scripted peer on ``socket`` that answers each request with ``results[method]``,
    then sends the deltas ``deltas_after[method]``; subscribe a real client to it until it
    holds snapshot ``last_seq``. Return (the methods asked, the client's notifications, the
    snapshot held)."""
    asked: list[str] = []

    async def serve(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        def send(message: dict) -> None:
            writer.write(json.dumps(message).encode() + b"\n")

        while line := await reader.readline():
            request = json.loads(line)
            asked.append(request["method"])
            send({"jsonrpc": "2.0", "id": request["id"], "result": results[request["method"]]})
            for delta in deltas_after.get(request["method"], []):
                send(notification(NOTIFY_DELTA, delta))

    server = await asyncio.start_unix_server(serve, path=str(socket))
    client = await DaemonClient.connect(socket)
    notes: list[Notification] = []
    client.add_listener(notes.append)
    try:
        await client.subscribe()
        latest = await client.wait_for_snapshot(lambda s: s["seq"] == last_seq, 10)
    finally:
        await client.close()
        server.close()
    return asked, notes, latest


async def test_a_missed_delta_makes_the_client_ask_for_the_whole_snapshot_and_go_on(
    tmp_path: Path,
) -> None:
    results = {
        "hello": {"protocol_version": "1.0"},
        "subscribe": _snapshot(1, "waiting_for_operator"),
        "status": _snapshot(6, "reviewing"),
    }
    deltas_after = {
        "subscribe": [
            _delta(1, 2, "settling"),
            _delta(4, 5, "collecting"),  # 3 and 4 missed
            _delta(5, 6, "reviewing"),  # ignored meanwhile
        ],
        "status": [
            _delta(5, 6, "reviewing"),  # already held
            _delta(6, 7, "waiting_for_operator"),
        ],
    }
    asked, notes, latest = await follow_peer(tmp_path / "daemon.sock", results, deltas_after, 7)
    assert asked == ["hello", "subscribe", "status"]
    assert latest == _snapshot(7, "waiting_for_operator")
    assert [(n.method, n.params["seq"], n.params["state"]) for n in notes] == [
        (NOTIFY_SNAPSHOT, 2, "settling"),
        (NOTIFY_SNAPSHOT, 6, "reviewing"),
        (NOTIFY_SNAPSHOT, 7, "waiting_for_operator"),
    ]


def _reading(seq: int) -> dict:
    # invented charges, for the shape of the messages only
    return {"id": 100 + seq, "seq": seq, "charge_nC": 20.0 + 0.001 * seq, "flags": []}


def _with_readings(seq: int, count: int) -> dict:
    readings = [_reading(n) for n in range(1, count + 1)]
    current = {"id": 7, "status": "collecting", "readings": readings, "readings_done": count}
    return {**_snapshot(seq, "collecting"), "sets": [current], "current_set": current}


def _reading_delta(base_seq: int, count: int) -> dict:
    """The delta that adds reading ``count`` to set 7: that reading alone, by its position."""
    change = {
        "id": 7,
        "changed": {"readings_done": count},
        "readings_count": count,
        "readings_at": [[count - 1, _reading(count)]],
    }
    return {
        "seq": base_seq + 1,
        "base_seq": base_seq,
        "changed": {},
        "sets": [],
        "set_changes": [change],
        "current_set_id": 7,
    }


async def test_a_client_that_missed_a_reading_asks_for_the_whole_set_and_misses_none(
    tmp_path: Path,
) -> None:
    results = {
        "hello": {"protocol_version": "1.0"},
        "subscribe": _with_readings(1, 1),
        "status": _with_readings(4, 4),
    }
    deltas_after = {
        # the delta of reading 3 (seq 2 -> 3) never reaches this client
        "subscribe": [_reading_delta(1, 2), _reading_delta(3, 4)],
        "status": [_reading_delta(4, 5)],
    }
    asked, _notes, latest = await follow_peer(tmp_path / "daemon.sock", results, deltas_after, 5)
    assert asked == ["hello", "subscribe", "status"]
    assert [r["seq"] for r in latest["current_set"]["readings"]] == [1, 2, 3, 4, 5]
    assert latest["current_set"] is latest["sets"][0]
    assert latest["current_set"]["readings_done"] == 5
