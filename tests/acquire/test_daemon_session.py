"""Sessions through the real daemon in this process: engine, instrument thread, SQLite file and
Unix socket, with the simulated electrometer on the in-memory wire and a hand clock
(``in_process_daemon.py``). Time moves only when the test lets it, so a cable is pulled after
the first reading by construction, and a session takes no wall time waiting for the linac.

The closed loop: the simulator's chamber has known true factors (``truth``); the daemon reads it
through the real driver, and the corrections must recover them within the noise. Check values
come from the simulator (an independent implementation of the physics, drivers_generic), and
the factor definitions from TRS-398 as written in docs/physics.md. The same sessions over the
real pty, as processes, are in ``tests/e2e/test_daemon_e2e.py``.
"""

from __future__ import annotations

import asyncio
import json
import os
import pwd
import stat
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import pytest
from chargebook.acquire import protocol
from chargebook.acquire.client import DaemonError
from chargebook.acquire.commands.operator_auto import ACTOR, AutoOperator, AutoOperatorError
from chargebook.acquire.daemon.daemon import POLL_INTERVAL_S
from chargebook.acquire.record.store import Store

from tests.acquire.in_process_daemon import InProcessDaemon, demo_metadata, session_daemon

#: The simulator's noise is 0.03 % per reading (its ``truth`` says so); set means of 3–4
#: readings are good to about 0.02 %, so factors are compared at these tolerances.
K_POL_TOLERANCE = 1e-3
K_S_TOLERANCE = 2e-3  # the TRS-398 quadratic fits Boag's theory to ~0.1 % (docs/physics.md)
K_TP_TOLERANCE = 1e-4  # 273.2 (ours) against 273.15 (the simulator's) moves k_TP by ~1e-5
CHARGE_TOLERANCE = 3e-3  # relative: noise, slow drift and settling left after correction


def stored(db: Path) -> Store:
    """Return the station file opened read-only, as a reader beside the daemon would."""
    return Store.open(db, read_only=True)


def state_is(name: str):
    """Return a snapshot check: the engine is in state ``name``."""
    return lambda snapshot: snapshot["state"] == name


def collecting_with(readings_done: int):
    """Return a snapshot check: a set is being collected with ``readings_done`` readings."""

    def check(snapshot: dict[str, Any]) -> bool:
        current = snapshot["current_set"]
        return (
            snapshot["state"] == "collecting"
            and current is not None
            and current["readings_done"] >= readings_done
        )

    return check


@pytest.fixture
def metadata() -> dict[str, Any]:
    """The invented demo session metadata (Example Clinic (fictional); demo only)."""
    return demo_metadata()


@pytest.fixture
async def daemon(tmp_path: Path) -> AsyncIterator[InProcessDaemon]:
    """The daemon on the quick plan with the bench, time running."""
    async with session_daemon(tmp_path) as daemon:
        yield daemon


@pytest.mark.slow  # the whole default plan: some 40 readings
async def test_the_default_plan_runs_start_to_finish_and_recovers_the_true_factors(
    tmp_path, metadata
):
    async with session_daemon(tmp_path, plan="default") as daemon:
        seen = []
        client, operator = await daemon.operator(on_reading=lambda s, r: seen.append(r["id"]))
        final = await operator.run(metadata)
        await client.close()
        truth = daemon.sim.device.truth()
        socket_mode = stat.S_IMODE(os.stat(daemon.socket).st_mode)
        directory_mode = stat.S_IMODE(os.stat(daemon.socket.parent).st_mode)
    results = final["results"]
    assert final["state"] == "finished" and final["session"]["status"] == "finished"
    assert results["k_TP"] == pytest.approx(truth["k_TP"], abs=K_TP_TOLERANCE)
    assert results["k_pol"] == pytest.approx(truth["k_pol"], abs=K_POL_TOLERANCE)
    assert results["k_s"] == pytest.approx(truth["k_s"], abs=K_S_TOLERANCE)
    # Fully corrected, the charge per MU is the chamber's true sensitivity.
    routine_mu = 100.0  # the default plan's MU per reading
    per_MU = results["M_corrected_nC"] / routine_mu
    assert per_MU == pytest.approx(truth["sensitivity_nC_per_MU"], rel=CHARGE_TOLERANCE)
    expected_dose = truth["sensitivity_nC_per_MU"] * routine_mu * metadata["N_Dw"] * metadata["k_Q"]
    assert results["dose_Gy"] == pytest.approx(expected_dose, rel=CHARGE_TOLERANCE)
    with stored(daemon.db) as store:
        session_id = final["session"]["id"]
        assert sorted(seen) == [r.id for r in store.readings(session_id)]
        assert {s.status for s in store.sets(session_id)} == {"accepted"}
        assert store.traffic(session_id), "the raw instrument lines are recorded"
        actors = {e.actor for e in store.events(session_id)}
        assert ACTOR in actors
    assert (socket_mode, directory_mode) == (0o600, 0o700)


async def test_a_spiked_set_is_flagged_and_redone_keeping_the_old_set(daemon, metadata):
    client, operator = await daemon.operator()
    snapshot = await operator.start(metadata)
    snapshot = await operator.run_until(
        snapshot, lambda s: s["plan"][1]["status"] == "current" and "step.arm" in s["allowed"]
    )
    daemon.sim.device.set_spike()  # the routine set's first reading (no settling reading)
    snapshot = await operator.run_until(snapshot, state_is("reviewing"))
    current = snapshot["current_set"]
    codes = {f["code"] for f in current["flags"]} | {
        f["code"] for r in current["readings"] for f in r["flags"]
    }
    # The spiked first reading stands out: flagged on the reading and on the set.
    spiked = current["readings"][0]
    assert "outlier" in {f["code"] for f in spiked["flags"]}
    assert {"routine_outlier", "routine_sd_high"} <= codes
    snapshot = await client.call("set.redo", reason="spike on the first reading")
    assert snapshot["state"] == "waiting_for_operator"
    snapshot = await operator.run_until(snapshot, state_is("reviewing"))
    await client.close()
    with stored(daemon.db) as store:
        sets = [s for s in store.sets(snapshot["session"]["id"]) if s.step_key == "routine"]
        assert [(s.attempt, s.status) for s in sets] == [(1, "superseded"), (2, "reviewing")]
        assert sets[0].reason == "spike on the first reading"
        assert len(store.readings(snapshot["session"]["id"], sets[0].id)) == 3


async def test_abort_needs_confirmation_and_keeps_everything(daemon, metadata):
    client, operator = await daemon.operator()
    snapshot = await operator.start(metadata)
    snapshot = await operator.run_until(snapshot, collecting_with(2))
    with pytest.raises(DaemonError) as refused:
        await client.call("session.abort", reason="phantom moved", confirm=False)
    assert refused.value.code == protocol.CONFIRMATION_REQUIRED
    snapshot = await client.call("session.abort", reason="phantom moved", confirm=True)
    assert snapshot["state"] == "aborted"
    await client.close()
    session_id = snapshot["session"]["id"]
    with stored(daemon.db) as store:
        assert store.session(session_id).status == "aborted"
        assert store.session(session_id).reason == "phantom moved"
        assert store.sets(session_id)[-1].status == "aborted"
        assert len(store.readings(session_id)) >= 3  # leakage + the routine readings so far


async def test_each_event_a_request_causes_names_the_unix_account_beside_the_operator(
    daemon, metadata
):
    # The operator name is what the client claims; the account is what the kernel says about
    # the process on the other end of the socket (SO_PEERCRED).
    client = await daemon.connect(operator="claimed name")
    snapshot = await AutoOperator(client, daemon.bench.environment).start(metadata)
    await client.close()
    account = pwd.getpwuid(os.getuid()).pw_name
    with stored(daemon.db) as store:
        events = store.events(snapshot["session"]["id"])
        (started,) = [e for e in store.events(None) if e.kind == "daemon_started"]
    by_client = [e for e in events if e.actor == "claimed name"]
    assert {e.kind for e in by_client} >= {"session_created", "acquisition"}
    assert all(e.account == account for e in by_client)
    assert started.account is None  # no client asked for it


async def test_the_instrument_disconnected_mid_set_then_back(daemon, metadata):
    client, operator = await daemon.operator()
    snapshot = await operator.start(metadata)
    snapshot = await operator.run_until(snapshot, collecting_with(1))
    await daemon.stop_time()  # the set cannot move on while the cable is out
    daemon.sim.wire.unplug()
    daemon.time.advance(0.05)  # one poll interval: the daemon reads, and finds no instrument
    lost = await client.wait_for_snapshot(lambda s: not s["instrument"]["connected"], 20)
    assert lost["instrument"]["message"]
    interrupted = await client.wait_for_snapshot(state_is("interrupted"), 20)
    kept = {r["id"] for r in interrupted["current_set"]["readings"]}
    assert kept and "step.arm" not in interrupted["allowed"]
    daemon.sim.wire.plug()
    back = await client.wait_for_snapshot(lambda s: s["instrument"]["connected"], 30)
    assert set(back["allowed"]) >= {"step.arm", "set.redo"}
    daemon.let_time_run()
    final = await operator.run_until(back, state_is("finished"))
    await client.close()
    with stored(daemon.db) as store:
        kinds = [e.kind for e in store.events(final["session"]["id"])]
        assert "instrument_lost" in kinds and "instrument_back" in kinds
        assert kept <= {r.id for r in store.readings(final["session"]["id"])}


async def test_an_unattended_run_gives_up_in_words_when_the_electrometer_stays_away(
    daemon, metadata
):
    client, operator = await daemon.operator(stall_timeout_s=1.0)
    snapshot = await operator.start(metadata)
    snapshot = await operator.run_until(snapshot, collecting_with(1))
    await daemon.stop_time()
    daemon.sim.wire.unplug()
    daemon.time.advance(0.05)  # one poll interval: the daemon reads, and finds no instrument
    lost = await client.wait_for_snapshot(state_is("interrupted"), 20)
    with pytest.raises(AutoOperatorError) as gave_up:
        await operator.run_until(lost, state_is("finished"))
    said = str(gave_up.value)
    assert said.startswith("nothing changed for 1 s while the session waited on the electrometer")
    assert "which is not reachable (" in said
    assert f"session {lost['session']['id']} is left open as recorded" in said
    await client.close()
    daemon.sim.wire.plug()


async def test_malformed_messages_from_one_client_leave_another_undisturbed(daemon, metadata):
    good, operator = await daemon.operator()
    snapshot = await operator.start(metadata)
    socket_path = str(daemon.socket)
    reader, writer = await asyncio.open_unix_connection(socket_path, limit=1 << 20)

    async def send(raw: bytes) -> dict:
        writer.write(raw)
        await writer.drain()
        return json.loads(await reader.readline())

    assert (await send(b"this is not json\n"))["error"]["code"] == protocol.PARSE_ERROR
    assert (await send(b"[1, 2]\n"))["error"]["code"] == protocol.INVALID_REQUEST
    reply = await send(b'{"jsonrpc": "2.0", "id": 1, "method": "launch.rocket"}\n')
    assert reply["error"]["code"] == protocol.METHOD_NOT_FOUND
    reply = await send(b'{"jsonrpc": "1.0", "id": 2, "method": "status"}\n')
    assert reply["error"]["code"] == protocol.INVALID_REQUEST
    # The good client carries on between the bad messages.
    snapshot = await operator.run_until(snapshot, collecting_with(1))
    too_long = b'{"jsonrpc": "2.0", "id": 3, "method": "status", "x": "' + b"a" * 70_000 + b'"}\n'
    reply = await send(too_long)
    assert reply["error"]["code"] == protocol.INVALID_REQUEST
    assert await reader.read() == b""  # and that connection was closed
    writer.close()
    snapshot = await operator.run_until(snapshot, state_is("reviewing"))
    assert (await good.status())["state"] == "reviewing"
    await good.close()


async def test_bad_operator_input_is_refused_naming_the_field(daemon, metadata):
    client = await daemon.connect()
    await client.subscribe()
    bad_metadata = dict(metadata, k_Q="about one")
    with pytest.raises(DaemonError) as refused:
        await client.call("session.start", metadata=bad_metadata)
    assert refused.value.field == "k_Q" and "k_Q" in refused.value.message
    await client.call("session.start", metadata=metadata)
    await client.call("environment.set", temperature_C=21.5, pressure=100.8)
    cases = [
        ({"temperature_C": 80.0, "pressure": 100.8}, "temperature_C", protocol.INPUT_ERROR),
        ({"temperature_C": 21.5, "pressure": 20.0}, "pressure", protocol.INPUT_ERROR),
        (
            {"temperature_C": 21.5, "pressure": 5000.0, "pressure_unit": "hPa"},
            "pressure",
            protocol.INPUT_ERROR,
        ),
        ({"temperature_C": "warm", "pressure": 100.8}, "temperature_C", protocol.INVALID_PARAMS),
        (
            {"temperature_C": 21.5, "pressure": "high", "pressure_unit": "kPa"},
            "pressure",
            protocol.INVALID_PARAMS,
        ),
        (
            {"temperature_C": 21.5, "pressure": 1000.0, "pressure_unit": "bar"},
            "pressure_unit",
            protocol.INVALID_PARAMS,
        ),
    ]
    for params, field, code in cases:
        with pytest.raises(DaemonError) as refused:
            await client.call("environment.set", **params)
        assert refused.value.code == code
        assert refused.value.field == field and field in refused.value.message
        assert "pressure_kPa" not in refused.value.message  # the name the user wrote, only
    snapshot = await client.status()
    await client.close()
    assert snapshot["environment"]["temperature_C"] == 21.5
    with stored(daemon.db) as store:
        assert len(store.environment(snapshot["session"]["id"])) == 1  # nothing lost, nothing added


async def test_the_stop_an_abort_sends_is_recorded_with_the_aborted_session_not_the_next(
    daemon, metadata
):
    # The line is written by the instrument thread after the action; the next session may
    # already be open by then. Replay needs each line in the session whose action sent it.
    client, operator = await daemon.operator()
    snapshot = await operator.start(metadata)
    await operator.run_until(snapshot, collecting_with(1))
    aborted = await client.call("session.abort", reason="chamber cable damaged", confirm=True)
    await client.call("session.close")
    following = await operator.start(metadata)
    await client.close()
    first, second = aborted["session"]["id"], following["session"]["id"]
    for _ in range(400):  # the stop goes out within a turn of the instrument thread
        with stored(daemon.db) as store:
            sent = [row.line for row in store.traffic(first) if row.direction == "tx"]
            later = [row.line for row in store.traffic(second) if row.direction == "tx"]
        if sent and sent[-1].strip() == b"HOLD":  # query-plain's stop (its profile's template)
            break
        await asyncio.sleep(0.05)
    assert sent[-1].strip() == b"HOLD", sent[-3:]
    assert b"HOLD" not in [line.strip() for line in later[:1]]


async def test_the_automatic_operator_never_takes_over_a_session_it_did_not_start(daemon, metadata):
    console = await daemon.connect(operator="operator A")
    try:
        started = await console.call("session.start", metadata=metadata)  # left open at a desk
        automatic = AutoOperator(console, daemon.bench.environment)
        with pytest.raises(AutoOperatorError) as refused:
            await automatic.run(metadata)
        assert f"session {started['session']['id']} is open" in str(refused.value)
        assert "does not take over a session it did not start" in str(refused.value)
        still = await console.status()
    finally:
        await console.close()
    assert still["session"]["id"] == started["session"]["id"]
    assert still["sets"] == started["sets"]  # nothing accepted on the operator's behalf


async def test_an_early_capture_while_the_beam_is_on_is_a_bench_refusal_not_a_lost_electrometer(
    daemon, metadata
):
    client, operator = await daemon.operator()
    snapshot = await operator.start(metadata)
    snapshot = await operator.run_until(
        snapshot, lambda s: s["step_index"] == 1 and "step.arm" in s["allowed"]
    )
    await daemon.stop_time()  # instrument time moves only as this test says
    await client.call(protocol.Method.STEP_ARM)  # the bench starts the first beam (100 MU)
    engine, device = daemon.engine, daemon.sim.device
    for _ in range(4000):  # until the reading has a sample to capture, its beam still on
        reading = engine.reading
        if reading is not None and reading.last_t_s is not None and device.beam_on():
            break
        if not device.beam_on() or daemon.link.generation is not None:
            # before the beam nothing is missed; once on, each poll interval is read
            await daemon.caught_up(daemon.time.advance(POLL_INTERVAL_S))
        await asyncio.sleep(0.005)  # the instrument thread's turn
    assert device.beam_on()
    captured = await client.call(protocol.Method.READING_CAPTURE)  # its beam still on
    assert captured["current_set"]["readings_done"] == 1
    refused = await client.wait_for_snapshot(state_is("interrupted"), 20)
    assert refused["instrument"]["connected"] and refused["instrument"]["message"] is None
    assert refused["notice"].startswith("The beam of reading 2 could not be started: the bench ")
    assert "a beam is already on" in refused["notice"] and "electrometer" not in refused["notice"]
    session_id = refused["session"]["id"]
    with stored(daemon.db) as store:
        events = store.events(session_id)
    kinds = [e.kind for e in events]
    assert "instrument_fault" not in kinds and "instrument_lost" not in kinds
    # in causal order: the capture, the refused beam of the next reading, its reading dropped,
    # the set interrupted, the state change that says why
    start = kinds.index("reading_recorded", kinds.index("step_entered", kinds.index("set_status")))
    assert kinds[start : start + 5] == [
        "reading_recorded",
        "bench_refused",
        "reading_dropped",
        "set_status",
        "state_changed",
    ]
    recorded, bench, dropped, _status, changed = (e.detail() for e in events[start : start + 5])
    assert recorded["capture"] == "manual"
    assert bench["set_id"] == recorded["set_id"] and bench["reading_number"] == 2
    assert dropped["why"] == "bench refused" and changed["action"] == "bench refused"
    daemon.let_time_run()  # the beam ends; the operator continues the set, nothing was lost
    final = await operator.run_until(refused, state_is("finished"))
    await client.close()
    assert final["session"]["status"] == "finished"
