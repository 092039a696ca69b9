"""What the fault runs share: a station whose sessions run by themselves, and what they saw.

The daemon runs on the simulated electrometer (query-plain dialect) with its bench attached, the
end-to-end tests' quick plan and time scale, so a whole session takes a few seconds. The automatic
operator (``acquire.commands.operator_auto``) takes sessions through, one after another, as a
background task; a :class:`Witness` subscribed beside it notes every reading a client was told of,
and the session that was open, so that a run can check them against the database.
"""

from __future__ import annotations

import asyncio
import contextlib
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import Any

from chargebook.acquire.client import ConnectionLost, DaemonClient, Notification
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.commands.operator_auto import AutoOperator, environment_from_bench
from chargebook.acquire.protocol import NOTIFY_SNAPSHOT

from tests.bench.harness import REPO, Station, read_db, station

QUICK_PLAN = REPO / "tests" / "e2e" / "plans" / "quick.toml"
#: Wall seconds per simulated second, as in the end-to-end tests.
TIME_SCALE = 0.02


@contextlib.contextmanager
def quick_station(prefix: str) -> Iterator[Station]:
    """Yield a station (query-plain, fast time) whose daemon runs the quick plan with a bench."""
    with station(prefix, "query-plain", "--time-scale", str(TIME_SCALE)) as world:
        world.start_daemon(QUICK_PLAN, bench=True, time_scale=TIME_SCALE)
        yield world


@dataclass
class Witness:
    """Notes, from a subscribed client's snapshots, every reading announced and the session."""

    announced: set[int] = field(default_factory=set)
    open_session: int | None = None
    state: str = ""
    connected: bool = False
    snapshots: int = 0

    def __call__(self, note: Notification) -> None:
        if note.method != NOTIFY_SNAPSHOT or not isinstance(note.params, dict):
            return
        self.see(note.params)

    def see(self, snapshot: dict[str, Any]) -> None:
        """Take in one snapshot."""
        self.snapshots += 1
        self.state = snapshot.get("state", "")
        self.connected = bool((snapshot.get("instrument") or {}).get("connected"))
        session = snapshot.get("session") or {}
        self.open_session = session.get("id") if session.get("status") == "open" else None
        for entry in snapshot.get("sets", []):
            self.announced.update(reading["id"] for reading in entry["readings"])


async def operate(client: DaemonClient, world: Station, sessions: int | None = None) -> int:
    """Take sessions through with the automatic operator (the open one first, if any) until
    ``sessions`` are finished (None: until cancelled or cut off); return how many finished."""
    operator = AutoOperator(client, environment_from_bench(world.control), stall_timeout_s=60)
    finished = 0
    try:
        while sessions is None or finished < sessions:
            await operator.run(demo_metadata(), take_over=True)  # a resumed session goes on
            finished += 1
    except ConnectionLost:
        pass
    return finished


async def open_a_session(client: DaemonClient, world: Station) -> None:
    """Start a session with the automatic operator's metadata unless one is open (a session
    left open by the daemon is taken over as it is)."""
    operator = AutoOperator(client, environment_from_bench(world.control), stall_timeout_s=60)
    await operator.start(demo_metadata(), take_over=True)


async def watched_client(world: Station, witness: Witness) -> DaemonClient:
    """Return a client of the daemon whose snapshots the witness sees."""
    client = await world.connect(operator="automatic operator")
    client.add_listener(witness)
    witness.see(await client.subscribe())
    return client


def readings_on_disk(world: Station) -> set[int]:
    """Return the ids of every reading in the station database."""
    return {row[0] for row in read_db(world.db, "SELECT id FROM readings")}


def event_count(world: Station, kind: str) -> int:
    """Return how many audit events of ``kind`` the station database holds."""
    return int(read_db(world.db, "SELECT count(*) FROM events WHERE kind = ?", (kind,))[0][0])


async def until(predicate: Callable[[], bool], what: str, timeout_s: float = 60.0) -> None:
    """Wait until ``predicate()`` holds; raise RuntimeError naming ``what`` after the timeout."""
    deadline = time.monotonic() + timeout_s
    while not predicate():
        if time.monotonic() > deadline:
            raise RuntimeError(f"gave up after {timeout_s:g} s waiting for {what}")
        await asyncio.sleep(0.02)


async def stop(task: asyncio.Task) -> None:
    """Cancel ``task`` and wait for it, whatever it raised."""
    task.cancel()
    with contextlib.suppress(asyncio.CancelledError, Exception):
        await task
