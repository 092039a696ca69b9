"""The daemon's handling of one operator action, in process: its real socket server, engine and
SQLite file, with the instrument thread built but not started (no electrometer is needed for
the actions taken here: their commands wait in the thread's inbox).

One snapshot per action: the reply to an action is the snapshot its subscribers were sent,
built once (it was built twice, once to publish and once to reply).
"""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import json
import time
from collections.abc import AsyncIterator
from pathlib import Path

import pytest
from chargebook.acquire.client import DaemonClient, Notification
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.daemon.daemon import Daemon, DaemonOptions, InstrumentLink
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.protocol import NOTIFY_DELTA, NOTIFY_EVENT, NOTIFY_SNAPSHOT, apply_delta
from chargebook.acquire.record.store import Store
from chargebook.drivers_generic import build_electrometer, load_profile
from chargebook.drivers_generic.interface import Sample, TrafficDirection

from tests.acquire.test_engine import small_plan


def daemon_on_file(tmp_path: Path) -> Daemon:
    """Return a daemon (not running) with its station file open."""
    options = DaemonOptions(
        profile="query-plain",
        db_path=tmp_path / "station.sqlite",
        socket_path=tmp_path / "run" / "daemon.sock",
    )
    daemon = Daemon(options)
    daemon.store = Store.open(options.db_path)
    return daemon


def daemon_with_engine(
    tmp_path: Path, profile_name: str = "query-plain", plan: object = None
) -> Daemon:
    """Return a daemon (not running) with its station file, engine and instrument thread (never
    started), wired as ``Daemon.run`` wires them."""
    daemon = daemon_on_file(tmp_path)
    daemon.store.on_events_committed = daemon._emitted.extend
    profile = load_profile(profile_name)
    daemon.engine = Engine(
        daemon.store, capabilities=profile.capabilities, default_plan=plan or small_plan()
    )
    electrometer = build_electrometer(profile, port=str(tmp_path / "no-such-port"))
    daemon.link = InstrumentLink(electrometer, lambda kind, payload: None)  # never started
    return daemon


ACTIONS = [
    ("session.start", {"metadata": demo_metadata()}),
    ("environment.set", {"temperature_C": 20.0, "pressure": 101.325}),
    ("step.arm", {}),
    ("session.pause", {}),
    ("session.resume", {}),
    ("session.abort", {"reason": "chamber cable damaged", "confirm": True}),
]


async def test_an_action_builds_one_snapshot_and_replies_with_the_one_published(
    tmp_path: Path,
) -> None:
    daemon = daemon_with_engine(tmp_path)
    options = daemon.options
    builds: list[int] = []
    engine_snapshot = daemon.engine.snapshot

    def counted(*results: object) -> dict:
        builds.append(daemon.engine.seq)
        return engine_snapshot(*results)

    daemon.engine.snapshot = counted  # type: ignore[method-assign]  # counts, changes nothing
    await daemon.server.start()
    published: list[dict] = []

    def heard(note: Notification) -> None:
        if note.method == NOTIFY_SNAPSHOT:
            published.append(note.params)

    client = await DaemonClient.connect(options.socket_path, operator="operator A")
    try:
        client.add_listener(heard)
        await client.subscribe()
        for method, params in ACTIONS:
            builds.clear()
            reply = await client.call(method, **params)
            await client.wait_for_snapshot(lambda s, seq=reply["seq"]: s["seq"] == seq, 10)
            assert len(builds) == 1, f"{method} built {len(builds)} snapshots"
            assert published[-1] == reply  # the reply is the snapshot that was published
    finally:
        await client.close()
        await daemon.server.close()
        daemon.store.close()


def test_each_received_line_committed_gives_its_row_id_to_the_sample_read_from_it(
    tmp_path: Path,
) -> None:
    daemon = daemon_on_file(tmp_path)
    try:
        daemon.store.add_traffic(None, 0.5, "rx", b"an older line\r\n")
        sent, first, second = (
            (TrafficDirection.SENT, 1.0, b"Q?\r\n"),
            (TrafficDirection.RECEIVED, 1.001, b"Q +19.6023 nC A\r\n"),
            (TrafficDirection.RECEIVED, 1.001, b"Q +19.6030 nC A\r\n"),  # the same receive time
        )
        daemon._record_traffic(*sent)
        daemon._record_traffic(*first)
        first_ref = daemon._latest_received
        daemon._record_traffic(*second)
        second_ref = daemon._latest_received
        assert first_ref is not None and second_ref is not None and first_ref.id is None
        daemon._commit_traffic()
        rows = {row.id: row for row in daemon.store.traffic(None)}
        assert rows[first_ref.id].line == first[2]
        assert rows[second_ref.id].line == second[2]  # not found by its (shared) time
    finally:
        daemon.store.close()


async def test_events_are_broadcast_as_committed_without_reading_them_back(tmp_path: Path) -> None:
    daemon = daemon_with_engine(tmp_path)
    statements: list[str] = []
    daemon.store.db.conn.set_trace_callback(statements.append)
    await daemon.server.start()
    heard: list[dict] = []
    client = await DaemonClient.connect(daemon.options.socket_path, operator="operator A")
    try:
        client.add_listener(lambda note: note.method == NOTIFY_EVENT and heard.append(note.params))
        await client.subscribe()
        for method, params in ACTIONS:
            await client.call(method, **params)
        await client.call("session.close")
        await client.call("status")  # the notifications before it have arrived
    finally:
        await client.close()
        await daemon.server.close()
    daemon.store.db.conn.set_trace_callback(None)
    recorded = daemon.store.events(1)
    daemon.store.close()
    assert [event["id"] for event in heard] == [event.id for event in recorded]
    assert heard[-1]["kind"] == "state_changed" and heard[-1]["detail"]["action"] == "session.close"
    assert heard[0]["actor"] == "operator A" and heard[0]["detail"] == recorded[0].detail()
    read_back = [sql for sql in statements if "FROM events WHERE" in sql]
    assert read_back == []


class RawSubscriber:
    """A subscriber on the daemon's socket that keeps every line it is sent, as sent."""

    def __init__(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self.reader, self.writer = reader, writer
        self.ids = itertools.count(1)

    @classmethod
    async def connect(cls, path: Path) -> RawSubscriber:
        reader, writer = await asyncio.open_unix_connection(str(path), limit=2**25)
        return cls(reader, writer)

    async def call(self, method: str) -> tuple[dict, list[dict]]:
        """Send one request; return its reply and the notifications that came before it."""
        request_id = next(self.ids)
        self.writer.write(
            json.dumps({"jsonrpc": "2.0", "id": request_id, "method": method}).encode() + b"\n"
        )
        notes = []
        while True:
            message = json.loads(await self.reader.readline())
            if message.get("id") == request_id:
                return message["result"], notes
            notes.append(message)

    def close(self) -> None:
        self.writer.close()


async def test_subscribers_are_sent_what_changed_and_rebuild_each_snapshot_from_it(
    tmp_path: Path,
) -> None:
    daemon = daemon_with_engine(tmp_path)
    await daemon.server.start()
    client = await DaemonClient.connect(daemon.options.socket_path, operator="operator A")
    raw = await RawSubscriber.connect(daemon.options.socket_path)
    try:
        held, _ = await raw.call("subscribe")
        redo = [("set.redo", {"reason": "cable moved"}), ("step.arm", {})]
        for method, params in [*ACTIONS[:3], *redo * 3, ("session.pause", {})]:
            reply = await client.call(method, **params)
            _, notes = await raw.call("hello")  # every notification of the action is in
            deltas = [n["params"] for n in notes if n["method"] == NOTIFY_DELTA]
            assert [n["method"] for n in notes if n["method"] != NOTIFY_EVENT] == [NOTIFY_DELTA]
            held = apply_delta(held, deltas[0])
            assert held == reply, method
        assert len(held["sets"]) == 4  # three redone and the one paused
        assert deltas[0]["sets"] == []  # a pause changes no set: none is sent
        assert "sets" not in deltas[0]["changed"] and "plan" not in deltas[0]["changed"]
    finally:
        raw.close()
        await client.close()
        await daemon.server.close()
        daemon.store.close()


#: A dialect in which every line the electrometer pushes is a completed reading.
PUSHED_EVERY_LINE = Path(__file__).parents[1] / "bench" / "profiles" / "pushed-every-line.toml"
STREAMED_READINGS = 12
#: One routine set of STREAMED_READINGS pushed readings, no settling reading.
STREAMED_PLAN = f"""
name = "streamed"
description = "One routine set of pushed readings"
routine_bias_V = 300.0

[[steps]]
key = "routine"
purpose = "routine"
readings = {STREAMED_READINGS}
mu_per_reading = 1.0
settling = {{}}
prompt = "Readings arrive pushed by the electrometer."
"""


async def stream_readings(daemon: Daemon, client: DaemonClient, count: int) -> None:
    """Open a session on ``daemon``, arm its set and hand it ``count`` completed readings as the
    instrument thread would, each once the client has seen the one before."""
    for method, params in ACTIONS[:2]:  # start, air
        await client.call(method, **params)
    await client.call("step.manual_done", note="bias set by hand")  # no remote bias here
    await client.call("step.arm")
    for number in range(1, count + 1):
        # invented charges (demo only), received after the reading was armed (daemon's clock)
        charge_nC = 20.0 + 0.001 * (number % 3)
        sample = Sample(t_s=time.monotonic(), charge_nC=charge_nC, complete=True)
        chunk = ([sample], None, [(None, 0)])  # one sample, its line not recorded
        daemon._events.put_nowait(("samples", (daemon._generation, [chunk])))
        await client.wait_for_snapshot(
            lambda s, n=number: len((s["current_set"] or s["sets"][-1])["readings"]) >= n, 10
        )


@contextlib.asynccontextmanager
async def streaming_daemon(tmp_path: Path) -> AsyncIterator[tuple[Daemon, DaemonClient]]:
    """Yield a daemon serving its socket and taking the instrument's news, whose every pushed
    line is a completed reading, on a plan of one set of STREAMED_READINGS readings, and a
    subscribed client of it."""
    plan = tmp_path / "streamed.toml"
    plan.write_text(STREAMED_PLAN)
    daemon = daemon_with_engine(tmp_path, str(PUSHED_EVERY_LINE), str(plan))
    await daemon.server.start()
    consumer = asyncio.create_task(daemon._consume_instrument())
    client = await DaemonClient.connect(daemon.options.socket_path, operator="operator A")
    try:
        await client.subscribe()
        yield daemon, client
    finally:
        consumer.cancel()
        await client.close()
        await daemon.server.close()
        daemon.store.close()


async def test_a_streamed_reading_is_sent_alone_and_the_results_of_the_whole_set_follow(
    tmp_path: Path,
) -> None:
    async with streaming_daemon(tmp_path) as (daemon, client):
        raw = await RawSubscriber.connect(daemon.options.socket_path)
        try:
            held, _ = await raw.call("subscribe")
            await stream_readings(daemon, client, STREAMED_READINGS)
            _, notes = await raw.call("hello")  # every notification so far is in
            final = await client.call("status")
        finally:
            raw.close()
    deltas = [note["params"] for note in notes if note["method"] == NOTIFY_DELTA]
    sent_readings = []
    for delta in deltas:
        held = apply_delta(held, delta)
        for change in delta.get("set_changes", []):
            sent_readings += [reading["seq"] for _position, reading in change["readings_at"]]
            if change["readings_at"] and held["state"] == "collecting":
                assert "results" not in delta["changed"]  # they follow in a delta of their own
    # every reading was sent once, alone: never again with the next ones
    assert sorted(sent_readings) == list(range(1, STREAMED_READINGS + 1))
    # the set complete: the snapshot held shows the results of all its readings, at once
    assert held["state"] == "reviewing" and held == final
    routine = held["sets"][-1]
    assert len(routine["readings"]) == STREAMED_READINGS
    assert routine["stats"]["count"] == STREAMED_READINGS
    # the raw charge M of the results is the mean of all twelve readings, not of fewer
    assert held["results"]["M_raw_nC"] == pytest.approx(routine["stats"]["mean_nC"], rel=1e-12)


async def test_readings_that_stop_mid_set_get_the_results_of_all_of_them_without_more_input(
    tmp_path: Path,
) -> None:
    async with streaming_daemon(tmp_path) as (daemon, client):
        await stream_readings(daemon, client, 5)  # then the beam stops: the set is collecting

        def all_five_in_results(snapshot: dict) -> bool:
            readings = snapshot["current_set"]["readings"]
            mean_nC = sum(r["charge_nC"] for r in readings) / len(readings)
            raw_nC = (snapshot["results"] or {}).get("M_raw_nC")
            return len(readings) == 5 and raw_nC == pytest.approx(mean_nC, rel=1e-12)

        held = await client.wait_for_snapshot(all_five_in_results, 10)
    assert held["state"] == "collecting" and held["results_provisional"] is True
