"""Operator actions killed in flight: what an action leaves in the record when the daemon dies.

An action is *whole* when all of its rows are in the record (its status change, its event and
its input in the input log), *absent* when none are, and *partial* otherwise: the last must
never happen, because each action is one transaction. Each action is judged by three counts read
from the station file before and after the kill: the rows its status change leaves (a superseded
set, an accepted set, an aborted session, an environment entry), the events that record the
action (the ``state_changed`` event with the action's name, or ``environment_entered``) and the
action's rows in the input log (table ``inputs``).
"""

from __future__ import annotations

import asyncio
import contextlib
import random
import time
from dataclasses import dataclass
from typing import Any

from chargebook.acquire.client import DaemonClient, DaemonError
from chargebook.acquire.engine import inputs
from chargebook.acquire.protocol import Method

from tests.bench.harness import Station, read_db
from tests.faults.sessions import Witness, open_a_session

#: The actions the run kills inside, with the parameters each is sent with.
ACTIONS: dict[str, dict[str, Any]] = {
    Method.SET_REDO: {"reason": "kill -9 fault run: redo"},
    Method.SET_ACCEPT: {},
    Method.SESSION_ABORT: {"reason": "kill -9 fault run: abort", "confirm": True},
    Method.ENVIRONMENT_SET: {"temperature_C": 21.5, "pressure": 101.2},
}
#: The kill follows the request by a seeded pause in this range, s: a few milliseconds, the
#: time the daemon takes to carry an action out, so kills land before, inside and after it.
KILL_AFTER_SEND_S = (0.0, 0.004)
#: How long to wait for an action to become legal (a set to finish, for accept), s.
LEGAL_WAIT_S = 30.0

_STATE_CHANGED = (
    "SELECT count(*) FROM events WHERE kind = 'state_changed' "
    "AND json_extract(detail_json, '$.action') = ?"
)
#: For each action: (rows its status change leaves, events that record it), as SQL counts.
_EFFECTS: dict[str, tuple[str, str]] = {
    Method.SET_REDO: (
        "SELECT count(*) FROM reading_sets WHERE status = 'superseded'",
        _STATE_CHANGED,
    ),
    Method.SET_ACCEPT: (
        "SELECT count(*) FROM reading_sets WHERE status = 'accepted'",
        _STATE_CHANGED,
    ),
    Method.SESSION_ABORT: (
        "SELECT count(*) FROM sessions WHERE status = 'aborted'",
        _STATE_CHANGED,
    ),
    Method.ENVIRONMENT_SET: (
        "SELECT count(*) FROM environment",
        "SELECT count(*) FROM events WHERE kind = 'environment_entered'",
    ),
}


def effect_counts(world: Station, action: str) -> tuple[int, int, int]:
    """Return (status rows, recording events, logged inputs) of ``action`` in the station
    database."""
    rows_sql, events_sql = _EFFECTS[action]
    params = () if "?" not in events_sql else (str(action),)
    rows = int(read_db(world.db, rows_sql)[0][0])
    events = int(read_db(world.db, events_sql, params)[0][0])
    kind = inputs.BY_METHOD[action].kind
    logged = int(read_db(world.db, "SELECT count(*) FROM inputs WHERE kind = ?", (kind,))[0][0])
    return rows, events, logged


def record_disagreements(world: Station) -> list[str]:
    """Return, for each action kind, where the record holds its rows without its events or
    the other way round (every action ever taken on the file, the automatic operator's too)."""
    problems = []
    for action in _EFFECTS:
        rows, events, logged = effect_counts(world, action)
        if not rows == events == logged:
            problems.append(
                f"{action}: {rows} status rows, {events} events and {logged} logged inputs"
            )
    return problems


@dataclass
class ActionKill:
    """What one kill inside an action left: the action sent and ``whole``/``absent``/``partial``."""

    action: str
    outcome: str


async def _make_legal(client: DaemonClient, witness: Witness, action: str) -> bool:
    """Carry the session on (arm, confirm a manual step) until ``action`` is allowed; return
    False if it is not within LEGAL_WAIT_S. For accept, the bench ends the set's readings."""
    deadline = time.monotonic() + LEGAL_WAIT_S
    while time.monotonic() < deadline:
        snapshot = await client.status()
        witness.see(snapshot)
        allowed = snapshot.get("allowed", [])
        if action in allowed:
            return True
        for step in (Method.STEP_MANUAL_DONE, Method.STEP_ARM):
            if step in allowed:
                with contextlib.suppress(DaemonError):
                    await client.call(step)
                break
        await asyncio.sleep(0.02)
    return False


async def kill_inside(
    world: Station, client: DaemonClient, witness: Witness, wanted: str, rng: random.Random
) -> ActionKill:
    """Send ``wanted`` (or, if it cannot be made legal, the first legal action of ACTIONS) and
    kill the daemon a seeded few milliseconds later; return what the action left. Every action
    needs an open session: one is started if the operator was stopped between two."""
    await open_a_session(client, world)
    action = wanted
    if not await _make_legal(client, witness, wanted):
        allowed = (await client.status()).get("allowed", [])
        action = next((a for a in ACTIONS if a in allowed), None)
        if action is None:
            raise RuntimeError(f"none of {list(ACTIONS)} became allowed (allowed: {allowed})")
    before = effect_counts(world, action)
    request = asyncio.create_task(client.call(action, **ACTIONS[action]))
    await asyncio.sleep(rng.uniform(*KILL_AFTER_SEND_S))
    world.kill_daemon()
    with contextlib.suppress(Exception):
        await request
    after = effect_counts(world, action)
    grown = tuple(now - then for now, then in zip(after, before, strict=True))
    outcome = {(0, 0, 0): "absent", (1, 1, 1): "whole"}.get(grown, "partial")
    return ActionKill(str(action), outcome)
