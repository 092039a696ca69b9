"""A session of 500 reading sets: the real daemon resumes it and every client still gets the whole
state (the daemon's messages are not bounded by the 64 KiB request limit)."""

from __future__ import annotations

from pathlib import Path

import pytest
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.protocol import MAX_MESSAGE_BYTES, encode_from_daemon, notification
from chargebook.acquire.record.store import Store
from chargebook.drivers_generic.interface import Capability
from e2e_support import QUICK_PLAN

pytestmark = [pytest.mark.e2e, pytest.mark.slow]

SETS = 500


class Clock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def deliver(engine: Engine, clock: Clock, charge_nC: float) -> None:
    """One beam delivery: the charge rises over 1 s, then holds until end of beam."""
    for i in range(1, 11):
        clock.now += 0.1
        engine.on_sample(clock.now, charge_nC * i / 10)
    reading = engine.reading
    while engine.reading is reading and engine.reading is not None:
        clock.now += 0.1
        engine.on_sample(clock.now, charge_nC)


def record_long_session(path: Path) -> int:
    """Record, through the real engine and store, a session whose routine set was taken and
    redone until the session holds ``SETS`` reading sets; leave it open, as at a crash."""
    clock = Clock()
    caps = {Capability.ZERO, Capability.INTEGRATE, Capability.READ_CHARGE, Capability.SET_BIAS}
    with Store.open(path) as store:
        engine = Engine(store, capabilities=caps, clock=clock, time_scale=0.02)
        session_id = engine.start_session(demo_metadata(), QUICK_PLAN, actor="operator A")
        engine.set_environment(21.0, 101.0, actor="operator A")
        engine.arm()  # the leakage step: beam off for its (scaled) duration
        while engine.state.value != "reviewing":
            clock.now += 0.5
            engine.on_sample(clock.now, 0.0004)
            engine.tick(clock.now)
        engine.accept(actor="operator A")
        for attempt in range(SETS - 1):
            engine.arm(actor="operator A")
            while engine.state.value != "reviewing":
                deliver(engine, clock, 20.0 + 0.001 * (attempt % 7))
            if attempt < SETS - 2:
                engine.redo("a long day at the bench", actor="operator A")
        assert len(store.sets(session_id)) == SETS
    return session_id


async def test_a_session_of_500_sets_is_resumed_and_sent_whole_to_every_client(
    tmp_path: Path, simulator, start_daemon
):
    db = tmp_path / "long.sqlite"
    session_id = record_long_session(db)
    daemon = start_daemon(simulator, db=db)
    client = await daemon.connect()
    try:
        subscribed = await client.subscribe()
        status = await client.status()
    finally:
        await client.close()
    for snapshot in (subscribed, status):
        assert snapshot["session"]["id"] == session_id
        assert len(snapshot["sets"]) == SETS
        assert snapshot["state"] == "reviewing"  # the last set, waiting to be accepted
    # what made the console go blind at about 90 sets: a message over the request limit
    sent = encode_from_daemon(notification("snapshot", status))
    assert len(sent) > MAX_MESSAGE_BYTES
