"""`chargebook replay` end to end: sessions recorded by the unattended runner, replayed through
the simulated electrometer in playback mode, the serial driver and the engine.

The sessions are recorded once for the module, on one station database: a clean run of
`chargebook run --unattended`; one with a spiked set that the automatic operator redoes; one
paused, resumed, captured by hand and aborted mid-set; one whose cable is pulled mid-set and
whose daemon is killed (kill -9) and restarted mid-set (the real daemon and the real simulator
on a pty, as in test_daemon_e2e); and one more clean run on an electrometer that pushes its
readings and has no remote bias (the push-exponent profile: the bias is turned by hand). Each must
replay exactly: every reading and every result bit-identical. The checks of exactness do not
trust the replay's own comparison alone: they read both sessions back through the store and the
project's result function, and check the what-if results against the published formulas.
"""

from __future__ import annotations

import asyncio
import hashlib
import itertools
import json
import os
import shutil
import sqlite3
import subprocess
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from chargebook.acquire.client import DaemonClient, DaemonError
from chargebook.acquire.commands.cli import main
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.commands.operator_auto import ACTOR, AutoOperator, environment_from_bench
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.station_lock import StationLock
from chargebook.acquire.record.store import Store
from chargebook.acquire.session.evaluation import evaluate_session
from e2e_support import (
    QUICK_PLAN,
    DaemonProcess,
    SimulatorProcess,
    chargebook_command,
    read_ready_line,
    stop_process,
)

#: slow: every test here needs the recorded station, which takes about 25 s to record.
pytestmark = [pytest.mark.e2e, pytest.mark.slow]

#: Wall seconds per simulated second while recording: a quick-plan session takes about 4 s.
TIME_SCALE = 0.01
REDO_REASON = "spike on the first routine reading"
ABORT_REASON = "phantom moved"
STOP_REASON = "only the leakage and routine sets were needed"
SHORT_REASON = "beam hold: door interlock opened"


@dataclass(frozen=True)
class Station:
    """The recorded station database and the ids of its sessions."""

    db: Path
    work: Path
    clean: int
    redone: int
    aborted: int
    interrupted: int
    pushed: int
    stopped: int


def start_simulator(work: Path, profile: str = "query-plain") -> SimulatorProcess:
    """Start `chargebook simulate` on a pty (query-plain: query mode, remote bias)."""
    log_path = work / f"simulator-{profile}.log"
    args = ["simulate", "--serial", "--profile", profile, "--seed", "1"]
    args += ["--time-scale", str(TIME_SCALE)]
    with log_path.open("wb") as log:
        process = subprocess.Popen(chargebook_command(*args), stdout=subprocess.PIPE, stderr=log)
    return SimulatorProcess(process, read_ready_line(process, log_path), log_path)


def run_unattended(simulator: SimulatorProcess, db: Path) -> int:
    """Record one session with `chargebook run --unattended`; return its id."""
    command = chargebook_command(
        "run", "--unattended", "--json", "--profile", simulator.profile,
        "--port", simulator.serial, "--bench-control", simulator.control,
        "--db", str(db), "--plan", QUICK_PLAN, "--time-scale", str(TIME_SCALE),
    )  # fmt: skip
    done = subprocess.run(command, capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)["session_id"]


def state_is(name: str):
    return lambda snapshot: snapshot["state"] == name


def collecting(step: int, readings_done: int):
    def check(snapshot: dict[str, Any]) -> bool:
        current = snapshot["current_set"]
        return (
            snapshot["state"] == "collecting"
            and snapshot["step_index"] == step
            and current["readings_done"] >= readings_done
        )

    return check


async def record_with_the_daemon(daemon: DaemonProcess, simulator: SimulatorProcess):
    """Record a session whose routine set is spiked and redone, one paused, captured by hand
    and aborted mid-set, and one interrupted twice: the cable pulled, then the daemon killed."""
    redone, aborted, stopped = await record_redo_abort_and_stop(daemon, simulator)
    client = await daemon.connect(operator=ACTOR)
    operator = AutoOperator(client, environment_from_bench(simulator.control))
    snapshot = await operator.start(demo_metadata())
    snapshot = await operator.run_until(snapshot, collecting(1, 1))
    with simulator.bench() as bench:
        bench.drop(0.5)  # the cable is pulled for half a second
    back = await client.wait_for_snapshot(
        lambda s: s["instrument"]["connected"] and s["state"] == "interrupted", 30
    )
    snapshot = await operator.run_until(back, collecting(2, 1))
    daemon.kill9()
    await client.close()
    daemon.restart()
    client = await daemon.connect(operator=ACTOR)
    final = await AutoOperator(client, environment_from_bench(simulator.control)).run(
        demo_metadata(),
        take_over=True,  # its own session, resumed after the kill
    )
    await client.close()
    assert final["session"]["id"] == snapshot["session"]["id"]
    return redone, aborted, final["session"]["id"], stopped


async def capture_by_hand(client: DaemonClient, attempts: int = 500) -> None:
    """Capture the charge so far as soon as a sample of the reading under way has arrived
    (the daemon refuses a capture before that, naming why)."""
    for _ in range(attempts):
        try:
            await client.call("reading.capture")
            return
        except DaemonError as refused:
            waiting = ("the reading in progress has no charge yet", "no reading is in progress")
            assert any(words in refused.message for words in waiting), refused.message
            await asyncio.sleep(0.005)
    pytest.fail("no sample arrived for the reading under way")


async def record_redo_abort_and_stop(daemon: DaemonProcess, simulator: SimulatorProcess):
    """Record a session whose routine set is spiked and redone, then one paused, resumed,
    captured by hand and aborted mid-set, then one stopped early mid-set after the operator
    recorded that a reading's delivery stopped short."""
    client = await daemon.connect(operator=ACTOR)
    operator = AutoOperator(client, environment_from_bench(simulator.control))
    snapshot = await operator.start(demo_metadata())
    snapshot = await operator.run_until(
        snapshot, lambda s: s["plan"][1]["status"] == "current" and "step.arm" in s["allowed"]
    )
    with simulator.bench() as bench:
        bench.spike()  # the routine set's first reading (it has no settling reading)
    snapshot = await operator.run_until(snapshot, state_is("reviewing"))
    snapshot = await client.call("set.redo", reason=REDO_REASON)
    redone = await operator.run_until(snapshot, state_is("finished"))
    snapshot = await operator.start(demo_metadata())
    snapshot = await operator.run_until(snapshot, state_is("reviewing"))  # the leakage set
    await client.call("session.pause")
    snapshot = await client.call("session.resume")
    await operator.run_until(snapshot, collecting(1, 1))
    await capture_by_hand(client)  # the second routine reading, mid-beam
    aborted = await client.call("session.abort", reason=ABORT_REASON, confirm=True)
    snapshot = await operator.start(demo_metadata())
    snapshot = await operator.run_until(snapshot, collecting(1, 2))
    first = next(r for r in snapshot["current_set"]["readings"] if not r["settling"])
    planned_MU = snapshot["plan"][1]["mu_per_reading"]
    await client.call(  # an operator action the input log holds, naming a reading by its id
        "reading.short_delivery", reading=first["id"], actual_MU=planned_MU / 2, reason=SHORT_REASON
    )
    stopped = await client.call("session.stop", reason=STOP_REASON)
    await client.close()
    return redone["session"]["id"], aborted["session"]["id"], stopped["session"]["id"]


@pytest.fixture(scope="module")
def station(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Station]:
    work = tmp_path_factory.mktemp("replay")
    db = work / "station.sqlite"
    simulator = start_simulator(work)
    try:
        clean = run_unattended(simulator, db)
        args = ["serve", "--profile", simulator.profile, "--port", simulator.serial]
        args += ["--db", str(db), "--socket", str(work / "run" / "daemon.sock")]
        args += ["--plan", QUICK_PLAN, "--time-scale", str(TIME_SCALE), "--log-level", "INFO"]
        args += ["--bench-control", simulator.control]
        daemon = DaemonProcess(args, work / "run" / "daemon.sock", db, work / "daemon.log")
        daemon.start()
        try:
            recorded = asyncio.run(record_with_the_daemon(daemon, simulator))
            redone, aborted, interrupted, stopped = recorded
        finally:
            daemon.stop()
    finally:
        stop_process(simulator.process)
    pushing = start_simulator(work, "push-exponent")
    try:
        pushed = run_unattended(pushing, db)
    finally:
        stop_process(pushing.process)
    yield Station(db, work, clean, redone, aborted, interrupted, pushed, stopped)


def copy_of(station: Station, name: str) -> Path:
    """Return a copy of the recorded station database, for a test that writes to it."""
    target = station.work / name
    shutil.copyfile(station.db, target)
    return target


def replay(db: Path, session_id: int, *options: str) -> subprocess.CompletedProcess:
    command = chargebook_command("replay", str(session_id), "--db", str(db), *options)
    return subprocess.run(command, capture_output=True, text=True, timeout=120, check=False)


def replayed_exactly(db: Path, session_id: int) -> dict[str, Any]:
    """Replay ``session_id`` at speed 0, check that it says it reproduced, return its report."""
    done = replay(db, session_id, "--speed", "0", "--json")
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout)
    assert report["reproduced"] is True and report["differences"] == []
    return report


def readings_by_set(store: Store, session_id: int) -> list[tuple[Any, ...]]:
    """Return every reading as (step, attempt, set status, seq, charge nC, settling, capture,
    time)."""
    sets = {s.id: s for s in store.sets(session_id)}
    rows = []
    for r in store.readings(session_id):
        reading_set = sets[r.set_id]
        where = (reading_set.step_key, reading_set.attempt, reading_set.status)
        rows.append((*where, r.seq, r.charge_nC, r.settling, r.capture, r.t_s))
    return rows


def line_of(store: Store, session_id: int, reading_traffic_id: int | None) -> bytes | None:
    lines = {row.id: row.line for row in store.traffic(session_id)}
    return lines.get(reading_traffic_id)


def file_state(db: Path) -> tuple[str, str]:
    """Return digests of the database file and of its write-ahead log (none: empty).

    The shared-memory index and an empty log, which any reader of a WAL database may leave
    beside it, hold no data and are not compared.
    """
    wal = db.with_name(db.name + "-wal")
    logged = wal.read_bytes() if wal.exists() else b""
    return hashlib.sha256(db.read_bytes()).hexdigest(), hashlib.sha256(logged).hexdigest()


# ------------------------------------------------------------------------------ exactness
def redo_kept_with_its_reason(store: Store, replay_id: int) -> None:
    routine = [s for s in store.sets(replay_id) if s.step_key == "routine"]
    assert [(s.attempt, s.status) for s in routine] == [(1, "superseded"), (2, "accepted")]
    assert routine[0].reason == REDO_REASON
    assert f"{ACTOR} (replayed)" in {e.actor for e in store.events(replay_id)}


def pause_capture_and_abort_kept(store: Store, replay_id: int) -> None:
    assert store.session(replay_id).reason == ABORT_REASON
    assert store.sets(replay_id)[-1].status == "aborted"
    assert [r.capture for r in store.readings(replay_id)][-1] == "manual"
    actions = [e.detail().get("action") for e in store.events(replay_id)]
    assert {"session.pause", "session.resume", "session.abort"} <= set(actions)


def interruptions_where_they_happened(store: Store, replay_id: int) -> None:
    kinds = {e.kind for e in store.events(replay_id)}
    resumed = {EventKind.INSTRUMENT_LOST, EventKind.INSTRUMENT_BACK, EventKind.SESSION_RESUMED}
    assert resumed <= kinds
    reasons = [
        e.detail()["reason"] for e in store.events(replay_id) if e.kind == EventKind.SET_STATUS
    ]
    assert "continued after the interruption" in reasons
    assert "the daemon restarted while the set was being collected" in reasons


def bias_turned_by_hand(store: Store, replay_id: int) -> None:
    done = [e for e in store.events(replay_id) if e.kind == EventKind.MANUAL_STEP_DONE]
    assert len(done) >= 2 and all(e.actor.endswith("(replayed)") for e in done)
    assert {r.capture for r in store.readings(replay_id)} >= {"pushed"}


def stopped_early(store: Store, replay_id: int) -> None:
    session = store.session(replay_id)
    assert (session.status, session.reason) == ("finished", STOP_REASON)
    assert store.sets(replay_id)[-1].status == "aborted"  # the set under way when stopped
    # The short delivery applied again, to the replay's own reading at the original's place.
    original_id = session.replay_of
    assert original_id is not None

    def shorts(session_id: int) -> list[tuple[int, float, str]]:
        place = {r.id: n for n, r in enumerate(store.readings(session_id))}
        found = [e.detail() for e in store.events(session_id) if e.kind == "delivery_short"]
        return [(place[d["reading_id"]], d["actual_MU"], d["reason"]) for d in found]

    assert len(shorts(original_id)) == 1 and shorts(replay_id) == shorts(original_id)
    assert shorts(replay_id)[0][2] == SHORT_REASON


SESSION_CHECKS = {
    "clean": lambda store, replay_id: None,
    "pushed": bias_turned_by_hand,
    "redone": redo_kept_with_its_reason,
    "aborted": pause_capture_and_abort_kept,
    "interrupted": interruptions_where_they_happened,
    "stopped": stopped_early,
}


@pytest.mark.parametrize("which", list(SESSION_CHECKS))
def test_every_recorded_session_replays_exactly(station: Station, which: str):
    db = copy_of(station, f"exact-{which}.sqlite")
    original_id = getattr(station, which)
    report = replayed_exactly(db, original_id)
    with Store.open(db, read_only=True) as store:
        replay_id = report["replay_session_id"]
        original, replayed = store.session(original_id), store.session(replay_id)
        assert replayed.replay_of == original_id and replayed.status == original.status
        old, new = readings_by_set(store, original_id), readings_by_set(store, replay_id)
        assert len(old) >= 3 and new == old  # charges, settling, capture and times identical
        assert report["readings_compared"] == len(old)
        # Every replayed reading was parsed from the same raw line as the original one.
        for before, after in zip(
            store.readings(original_id), store.readings(replay_id), strict=True
        ):
            assert line_of(store, original_id, before.traffic_id) is not None
            assert line_of(store, replay_id, after.traffic_id) == line_of(
                store, original_id, before.traffic_id
            )
        results = evaluate_session(store, original_id).results()
        assert evaluate_session(store, replay_id).results() == results
        assert report["results_compared"] == len(results)
        SESSION_CHECKS[which](store, replay_id)
        fed_from_the_input_log(store, original_id, replay_id)


def fed_from_the_input_log(store: Store, original_id: int, replay_id: int) -> None:
    """Check that the replay took exactly the original's logged inputs, in order: the same
    kinds, fields and engine clocks, by the same actors (replayed), each sample parsed again
    from a line of the same bytes, a short delivery naming the reading at the same place."""
    old_log, new_log = store.inputs(original_id), store.inputs(replay_id)
    assert len(old_log) > 10
    assert [(r.kind, f"{r.actor} (replayed)") for r in old_log] == [
        (r.kind, r.actor) for r in new_log
    ]
    for before, after in zip(old_log[1:], new_log[1:], strict=True):  # after the start
        old_fields, new_fields = before.detail(), after.detail()
        if before.kind == "sample":
            old_line = line_of(store, original_id, old_fields.pop("line_id"))
            assert old_line is not None
            assert line_of(store, replay_id, new_fields.pop("line_id")) == old_line
        if before.kind == "sample_run":  # the same lines' bytes, each session's own rows
            old_lines = run_lines(store, original_id, old_fields.pop("first_line_id"), before)
            new_lines = run_lines(store, replay_id, new_fields.pop("first_line_id"), before)
            assert len(old_lines) == old_fields["count"] and new_lines == old_lines
        if before.kind == "short_delivery":  # each names its own session's reading, same place
            old_place = [r.id for r in store.readings(original_id)].index(old_fields.pop("reading"))
            new_place = [r.id for r in store.readings(replay_id)].index(new_fields.pop("reading"))
            assert new_place == old_place
        assert new_fields == old_fields


def run_lines(store: Store, session_id: int, first_line_id: int, run: Any) -> list[bytes]:
    """Return the raw lines of a logged run of samples, from ``first_line_id`` on, in order."""
    ids = range(first_line_id, first_line_id + run.detail()["count"])
    found = store.traffic_lines(session_id, ids)
    return [found[row_id] for row_id in ids if row_id in found]


def step_the_clock_back(db: Path, session_id: int, seconds: float) -> None:
    """Rewrite the stamps of the second half of a session's traffic and events ``seconds``
    earlier, as a wall clock stepped back mid-session would have written them (the copy's
    append-only triggers are dropped to do it)."""
    conn = sqlite3.connect(db)
    with conn:
        for table in ("traffic", "events"):
            conn.execute(f"DROP TRIGGER {table}_refuse_update")
        places = [
            row[0]
            for row in conn.execute(
                "SELECT chain_seq FROM traffic WHERE session_id = ? UNION "
                "SELECT chain_seq FROM events WHERE session_id = ? ORDER BY 1",
                (session_id, session_id),
            )
        ]
        step_at = places[len(places) // 2]
        for table in ("traffic", "events"):
            rows = conn.execute(
                f"SELECT id, recorded_at FROM {table} WHERE session_id = ? AND chain_seq >= ?",
                (session_id, step_at),
            ).fetchall()
            for row_id, stamp in rows:
                stepped = datetime.fromisoformat(stamp) - timedelta(seconds=seconds)
                conn.execute(
                    f"UPDATE {table} SET recorded_at = ? WHERE id = ?",
                    (stepped.isoformat(timespec="microseconds"), row_id),
                )
    conn.close()


@pytest.mark.parametrize("which", ["redone", "aborted"])
def test_a_session_whose_clock_stepped_back_still_replays_exactly(station: Station, which: str):
    # Operator actions are placed among the raw lines by the session's chain order, not by
    # the wall-clock stamps: a clock stepped back 5 s mid-session moves nothing.
    db = copy_of(station, f"stepped-{which}.sqlite")
    original_id = getattr(station, which)
    step_the_clock_back(db, original_id, 5.0)
    report = replayed_exactly(db, original_id)
    with Store.open(db, read_only=True) as store:
        replay_id = report["replay_session_id"]
        assert readings_by_set(store, replay_id) == readings_by_set(store, original_id)
        SESSION_CHECKS[which](store, replay_id)


def test_an_aborted_session_replays_at_the_recorded_pace_too(station: Station):
    db = copy_of(station, "paced.sqlite")
    done = replay(db, station.aborted, "--speed", "4")
    assert done.returncode == 0, done.stderr
    assert "exact reproduction:" in done.stdout
    with Store.open(db, read_only=True) as store:
        replayed = store.sessions()[-1]
        assert (replayed.replay_of, replayed.status) == (station.aborted, "aborted")
        assert replayed.reason == ABORT_REASON


# ------------------------------------------------------------------------------ what if
def test_a_stricter_sd_threshold_changes_flags_only_and_says_why(station: Station):
    db = copy_of(station, "what-if-sd.sqlite")
    done = replay(
        db, station.clean, "--speed", "0", "--json", "--threshold", "relative_sd_pct=0.01"
    )
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout)
    assert report["what_if"] is True and report["reproduced"] is False
    assert report["changes"] == [
        {"what": "threshold relative_sd_pct", "original": 0.2, "replay": 0.01}
    ]
    differing = {d["what"] for d in report["differences"]}
    assert differing and all(what.startswith("result ") for what in differing)
    assert all("relative_sd_pct 0.2 → 0.01" in d["why"] for d in report["differences"])
    flags = next(d for d in report["differences"] if d["what"] == "result flags")
    added = {f["code"] for f in flags["replay"]} - {f["code"] for f in flags["original"]}
    # numpy's sample SD (ddof=1) of the routine readings, against the new 0.01 % limit.
    with Store.open(db, read_only=True) as store:
        routine = next(s for s in store.sets(station.clean) if s.step_key == "routine")
        charges = [r.charge_nC for r in store.readings(station.clean, routine.id)]
    relative_sd_pct = 100 * np.std(charges, ddof=1) / abs(np.mean(charges))
    assert ("routine_sd_high" in added) == (0.01 < relative_sd_pct < 0.2)


def reduced_bias_plan(path: Path, reduced_bias_V: float, routine_readings: int = 3) -> Path:
    """Write the quick plan with another reduced bias (and routine readings); return it."""
    text = Path(QUICK_PLAN).read_text()
    text = text.replace("reduced_bias_V = 100.0", f"reduced_bias_V = {reduced_bias_V}")
    text = text.replace(
        'purpose = "routine"\n', f'purpose = "routine"\nreadings = {routine_readings}\n'
    )
    path.write_text(text)
    return path


def test_another_reduced_bias_gives_the_two_voltage_k_s_of_the_new_ratio(station: Station):
    db = copy_of(station, "what-if-plan.sqlite")
    plan = reduced_bias_plan(station.work / "reduced-150.toml", 150.0)
    done = replay(db, station.clean, "--speed", "0", "--json", "--plan", str(plan))
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout)
    assert report["what_if"] is True and report["stopped"] is None
    assert any("'BIAS +150'" in note and "'BIAS +100'" in note for note in report["traffic_notes"])
    differences = {d["what"]: d for d in report["differences"]}
    assert differences["result voltage_ratio"]["replay"] == 2.0
    assert "reduced_bias_V 100.0 → 150.0" in differences["result k_s"]["why"]
    # The same readings, so M1/M2 is unchanged; TRS-398's pulsed-beam quadratic for n = 2
    # (a0, a1, a2 = 2.337, -3.636, 2.299; docs/physics.md, from memory) gives the new k_s.
    with Store.open(db, read_only=True) as store:
        replay_id = report["replay_session_id"]
        assert readings_by_set(store, replay_id) == readings_by_set(store, station.clean)
        results = evaluate_session(store, replay_id).results()
    ratio = results["charge_ratio"]
    assert results["k_s"] == pytest.approx(2.337 - 3.636 * ratio + 2.299 * ratio**2, abs=2e-3)
    assert differences["result k_s"]["replay"] == results["k_s"]


def test_a_plan_asking_for_fewer_readings_uses_the_first_ones_and_keeps_the_rest_in_step(
    station: Station,
):
    db = copy_of(station, "what-if-fewer.sqlite")
    plan = reduced_bias_plan(station.work / "fewer-routine.toml", 100.0, routine_readings=2)
    done = replay(db, station.clean, "--speed", "0", "--json", "--plan", str(plan))
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout)
    assert report["stopped"] is None and report["replay_session_id"] is not None
    readings = [d for d in report["differences"] if d["what"].startswith("reading")]
    assert readings == [
        {
            "what": "reading routine (attempt 1) #3",
            "original": "present",
            "replay": "absent",
            "why": "plan step 'routine' readings 3 → 2",
        }
    ]
    # M_raw is the mean of the routine readings used: numpy's mean of the first two.
    with Store.open(db, read_only=True) as store:
        routine = next(s for s in store.sets(station.clean) if s.step_key == "routine")
        first_two = [r.charge_nC for r in store.readings(station.clean, routine.id)][:2]
        results = evaluate_session(store, report["replay_session_id"]).results()
    assert results["M_raw_nC"] == pytest.approx(np.mean(first_two), rel=1e-12)


def test_a_plan_asking_for_more_readings_than_were_taken_stops_there_and_writes_nothing(
    station: Station,
):
    db = copy_of(station, "what-if-more.sqlite")
    before = file_state(db)
    plan = reduced_bias_plan(station.work / "more-routine.toml", 100.0, routine_readings=4)
    done = replay(db, station.clean, "--speed", "0", "--plan", str(plan))
    assert done.returncode == 0, done.stderr
    assert "stopped early:" in done.stdout and "(not stored)" in done.stdout
    words = " ".join(done.stdout.split())
    assert (
        "the new plan asks for 4 routine readings at step 2 (routine); the recording holds 3"
        in (words)
    )
    assert "set opposite (attempt 1) present absent" in words
    assert "step 'routine' readings 3 → 4" in words
    assert file_state(db) == before


def test_one_run_of_replays_holds_the_station_throughout_and_a_replay_not_stored_spoils_none(
    station: Station,
):
    # Several replays of one run share the station file, opened and locked once: a replay
    # rolled back (a what-if that stops early) leaves the open file fit for the next, which is
    # stored; the lock is held until the run ends, and then released.
    from chargebook.acquire.record.station_lock import StationInUse
    from chargebook.acquire.replay.session_replay import ReplayRequest, StationReplays

    db = copy_of(station, "one-run.sqlite")
    plan = reduced_bias_plan(station.work / "more-readings.toml", 100.0, routine_readings=4)
    with StationReplays(db) as replays:
        stopped = replays.replay(ReplayRequest(db, station.clean, speed=0, plan=str(plan)))
        assert stopped.stopped is not None and stopped.replay_id is None
        with pytest.raises(StationInUse):
            StationLock(db).acquire()  # held by the run, as a daemon would be refused
        kept = replays.replay(ReplayRequest(db, station.clean, speed=0))
        assert kept.reproduced and kept.replay_id is not None
        again = replays.replay(ReplayRequest(db, station.redone, speed=0))
        assert again.reproduced and again.replay_id == kept.replay_id + 1
    with StationLock(db), Store.open(db, read_only=True) as store:  # released at the end
        for original_id, report in ((station.clean, kept), (station.redone, again)):
            assert store.session(report.replay_id).replay_of == original_id
            fed_from_the_input_log(store, original_id, report.replay_id)


# ---------------------------------------------------------------- corrupted and truncated logs
def traffic_log(station: Station, path: Path, session_id: int, capsys) -> list[str]:
    """Write the session's stored traffic as a JSON-lines log with `chargebook replay
    --write-traffic-log`; return its lines."""
    status = main(
        ["replay", str(session_id), "--db", str(station.db), "--write-traffic-log", str(path)]
    )
    assert status == 0 and f"lines of session {session_id}" in capsys.readouterr().err
    return path.read_text().splitlines()


def test_the_stored_traffic_written_as_a_log_replays_exactly(station: Station, capsys):
    db = copy_of(station, "log-exact.sqlite")
    log = station.work / "exact.jsonl"
    traffic_log(station, log, station.clean, capsys)
    done = replay(db, station.clean, "--speed", "0", "--traffic-log", str(log))
    assert done.returncode == 0, done.stderr
    assert "exact reproduction:" in done.stdout


def corrupt_reading_line(lines: list[str]) -> tuple[list[str], int, str]:
    """Return the log with one charge value garbled, the line number and its original text."""
    for index, text in enumerate(lines):
        entry = json.loads(text)
        if entry["dir"] == "rx" and entry["line"].startswith("Q +1"):
            original = entry["line"]
            entry["line"] = original.replace(".", "x", 1)
            return [*lines[:index], json.dumps(entry), *lines[index + 1 :]], index + 1, original
    raise AssertionError("no reading line with a beam charge in the log")


@pytest.mark.parametrize(
    "fault", ["garbled reading", "not json", "truncated mid-set", "line added"]
)
def test_a_corrupted_or_truncated_log_is_refused_naming_the_line_and_nothing_is_written(
    station: Station, fault: str, capsys
):
    db = copy_of(station, f"log-{fault.replace(' ', '-')}.sqlite")
    log = station.work / f"{fault.replace(' ', '-')}.jsonl"
    lines = traffic_log(station, log, station.clean, capsys)
    if fault == "garbled reading":
        lines, number, original = corrupt_reading_line(lines)
        expected = [f"line {number}", f"{original!r}", "cannot be read by profile query-plain"]
    elif fault == "not json":
        number = len(lines) // 2
        lines[number - 1] = lines[number - 1][:-5]
        expected = [f"line {number}", "not valid JSON"]
    elif fault == "line added":
        number = next(i for i, t in enumerate(lines) if "Q +1" in t) + 4  # inside the routine set
        added = json.loads(lines[number - 1])
        added["line"] = "Q +7.0000 nC A"  # a reading line of the dialect, never received
        lines.insert(number - 1, json.dumps(added))
        expected = [f"log line {number} ('Q +7.0000 nC A') is not in the session's traffic"]
    else:
        cut = next(i for i, t in enumerate(lines) if "Q +1" in t) + 8  # inside the routine set
        lines = lines[:cut]
        expected = [f"ends after line {cut}", "truncated", "in reading set 'routine' (attempt 1)"]
    log.write_text("\n".join(lines) + "\n")
    before = file_state(db)
    with Store.open(db, read_only=True) as store:
        sessions_before = len(store.sessions())
    done = replay(db, station.clean, "--speed", "0", "--traffic-log", str(log))
    assert done.returncode == 2, done.stdout + done.stderr
    message = done.stderr
    assert f"session {station.clean}" in message and "nothing was written" in message
    for words in expected:
        assert words in message
    assert file_state(db) == before
    with Store.open(db, read_only=True) as store:
        assert len(store.sessions()) == sessions_before


def edit_reading_values(lines: list[str]) -> list[str]:
    """Return the log with every beam charge of 10 to 20 nC raised by 10 nC (valid lines)."""
    edited = []
    for text in lines:
        entry = json.loads(text)
        if entry["dir"] == "rx" and entry["line"].startswith("Q +1"):
            entry["line"] = entry["line"].replace("Q +1", "Q +2", 1)
        edited.append(json.dumps(entry))
    assert edited != lines, "no reading line with a beam charge in the log"
    return edited


def test_an_edited_log_that_does_not_reproduce_is_stored_only_with_keep_and_marked(
    station: Station, capsys
):
    db = copy_of(station, "log-edited.sqlite")
    log = station.work / "edited.jsonl"
    lines = edit_reading_values(traffic_log(station, log, station.clean, capsys))
    log.write_text("\n".join(lines) + "\n")
    before = file_state(db)
    done = replay(db, station.clean, "--speed", "0", "--traffic-log", str(log))
    assert done.returncode == 1, done.stdout + done.stderr
    assert "NOT reproduced" in done.stdout and "(not stored)" in done.stdout
    assert "not stored: the traffic log" in done.stdout and "pass --keep" in done.stdout
    assert file_state(db) == before  # nothing written
    kept = replay(db, station.clean, "--speed", "0", "--traffic-log", str(log), "--keep")
    assert kept.returncode == 1, kept.stdout + kept.stderr
    assert "NOT reproduced" in kept.stdout and "(not stored)" not in kept.stdout
    with Store.open(db, read_only=True) as store:
        replay_id = store.sessions()[-1].id
        assert store.session(replay_id).replay_of == station.clean
        marks = [e for e in store.events(replay_id) if e.kind == EventKind.REPLAY_NOT_REPRODUCED]
    assert len(marks) == 1 and marks[0].detail()["traffic_log"] == str(log)


def one_rising_charge_changed(lines: list[str]) -> tuple[list[str], int, str]:
    """Return the log with the last digit of one charge on the way up during a beam changed
    (by about 0.0001 nC: it moves no reading), that line's number and its original value."""
    read = [(index, _charge_nC(text)) for index, text in enumerate(lines)]
    read = [(index, charge) for index, charge in read if charge is not None]
    number = next(  # the first charge on the way up, well before the next
        index + 1
        for (index, charge), (_, following) in itertools.pairwise(read)
        if 2.0 < charge < 8.0 and following > charge + 1.0
    )
    entry = json.loads(lines[number - 1])
    head, value, *rest = entry["line"].split(" ")
    last = "1" if value[-1] == "0" else "0"
    entry["line"] = " ".join([head, value[:-1] + last, *rest])
    return [*lines[: number - 1], json.dumps(entry), *lines[number:]], number, value


def test_a_log_with_one_line_changed_is_not_called_exact_though_its_results_agree(
    station: Station, capsys
):
    # A charge on the way up during a beam moves no reading: the results come out the same,
    # but the log is not the stored traffic, so the replay does not reproduce the session.
    db = copy_of(station, "log-one-line.sqlite")
    log = station.work / "one-line.jsonl"
    lines, number, value = one_rising_charge_changed(
        traffic_log(station, log, station.clean, capsys)
    )
    log.write_text("\n".join(lines) + "\n")
    before = file_state(db)
    done = replay(db, station.clean, "--speed", "0", "--traffic-log", str(log))
    assert done.returncode == 1, done.stdout + done.stderr
    assert "NOT reproduced: 1 difference" in done.stdout and "(not stored)" in done.stdout
    assert f"traffic line {number} " in done.stdout and value in done.stdout  # table cells wrap
    assert "the traffic log played is not the traffic stored with the session" in done.stdout
    assert file_state(db) == before  # nothing written


def test_a_what_if_of_a_changed_log_is_stored_only_with_keep_and_marked(station: Station, capsys):
    db = copy_of(station, "log-what-if.sqlite")
    log = station.work / "what-if.jsonl"
    lines, _number, _value = one_rising_charge_changed(
        traffic_log(station, log, station.clean, capsys)
    )
    log.write_text("\n".join(lines) + "\n")
    what_if = ("--speed", "0", "--traffic-log", str(log), "--threshold", "relative_sd_pct=0.01")
    before = file_state(db)
    done = replay(db, station.clean, *what_if)
    assert "(not stored)" in done.stdout, done.stdout + done.stderr
    assert "is not the traffic stored with the session; pass --keep" in done.stdout
    assert file_state(db) == before  # nothing written
    replay(db, station.clean, *what_if, "--keep")
    with Store.open(db, read_only=True) as store:
        replay_id = store.sessions()[-1].id
        assert store.session(replay_id).replay_of == station.clean
        marks = [e for e in store.events(replay_id) if e.kind == EventKind.REPLAY_NOT_REPRODUCED]
    assert len(marks) == 1 and marks[0].detail()["traffic_log"] == str(log)


def _charge_nC(log_line: str) -> float | None:
    """Return the charge of a received reading line of the query-plain log (None: another)."""
    entry = json.loads(log_line)
    words = entry["line"].split()
    if entry["dir"] != "rx" or len(words) != 4 or words[0] != "Q":
        return None
    return float(words[1])


# ------------------------------------------------------------------- several in one run
def replay_many(db: Path, *arguments: str) -> subprocess.CompletedProcess:
    command = chargebook_command("replay", *arguments, "--db", str(db), "--speed", "0", "--json")
    return subprocess.run(command, capture_output=True, text=True, timeout=300, check=False)


def test_several_sessions_replay_in_one_run_each_stored_and_one_refused_stops_no_other(
    station: Station,
):
    db = copy_of(station, "several.sqlite")
    done = replay_many(db, str(station.clean), "999", str(station.redone))
    assert done.returncode == 2, done.stderr  # session 999 cannot be used; the others ran
    report = json.loads(done.stdout)
    assert [s["original_session_id"] for s in report["sessions"]] == [
        station.clean,
        999,
        station.redone,
    ]
    clean, missing, redone = report["sessions"]
    assert "no session with id 999" in missing["error"] and missing["exit_status"] == 2
    assert report["replayed"] == 2 and report["reproduced"] is False
    with Store.open(db, read_only=True) as store:
        for original_id, said in ((station.clean, clean), (station.redone, redone)):
            assert said["reproduced"] is True and said["exit_status"] == 0
            replay_id = said["replay_session_id"]
            assert store.session(replay_id).replay_of == original_id
            assert readings_by_set(store, replay_id) == readings_by_set(store, original_id)
            fed_from_the_input_log(store, original_id, replay_id)


def test_a_visit_replays_its_sessions_in_the_order_measured_in_one_run(station: Station):
    from chargebook.acquire.record import visits

    db = copy_of(station, "visit.sqlite")
    measured = (station.pushed, station.clean)  # the order the beams were measured in
    with Store.open(db) as store:  # a visit of two beams, through the store's API
        visit_id = visits.create_visit(store, "DEMO-LA1", {"operator": "test"})
        for number, session_id in enumerate(measured, 1):
            beam = visits.add_beam(store, visit_id, f"beam {number}", "quick", {})
            visits.link_session(store, visit_id, beam, session_id)
    done = replay_many(db, "--visit", str(visit_id))
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout)
    assert report["visit_id"] == visit_id and report["reproduced"] is True
    assert [s["original_session_id"] for s in report["sessions"]] == list(measured)
    with Store.open(db, read_only=True) as store:
        for said in report["sessions"]:
            replay_id, original_id = said["replay_session_id"], said["original_session_id"]
            assert readings_by_set(store, replay_id) == readings_by_set(store, original_id)
    text = subprocess.run(
        chargebook_command("replay", "--visit", str(visit_id), "--db", str(db), "--dry-run",
                           "--speed", "0"),
        capture_output=True, text=True, timeout=300, check=False,
    )  # fmt: skip
    assert text.returncode == 0, text.stderr
    assert f"visit {visit_id}: 2 session(s), 2 replayed, 2 reproduced exactly" in text.stdout
    assert "qualified medical physicist" in text.stdout


@pytest.mark.parametrize(
    ("arguments", "named"),
    [
        ([], "SESSION"),
        (["1", "--visit", "1"], "--visit"),
        (["--visit", "99"], "no visit with id 99"),
        (["1", "2", "--traffic-log", "x.jsonl"], "--traffic-log"),
        (["1", "2", "--write-traffic-log", "x.jsonl"], "--write-traffic-log"),
    ],
)
def test_a_request_for_several_sessions_that_cannot_be_used_is_refused_naming_it(
    station: Station, capsys, arguments, named
):
    before = file_state(station.db)
    status = main(["replay", *arguments, "--db", str(station.db), "--speed", "0"])
    captured = capsys.readouterr()
    assert status == 2 and named in captured.err and captured.out == ""
    assert file_state(station.db) == before


@pytest.mark.parametrize(
    ("options", "named"),
    [
        (["--threshold", "nonsense=1"], "thresholds.nonsense"),
        (["--plan", "no-such-plan"], "no-such-plan"),
        (["--profile", "no-such-profile"], "no-such-profile"),
    ],
)
def test_a_mistake_every_replay_would_make_is_said_once_before_any_replay(
    station: Station, capsys, options, named
):
    before = file_state(station.db)
    sessions = [str(station.clean), str(station.redone), str(station.pushed)]
    status = main(["replay", *sessions, "--db", str(station.db), "--speed", "0", *options])
    captured = capsys.readouterr()
    assert status == 2 and captured.out == ""
    (said,) = captured.err.strip().splitlines()  # once, not once a session
    assert named in said and said.endswith("nothing was written")
    assert file_state(station.db) == before


def test_a_daemon_holding_the_file_is_said_once_for_several_sessions(station: Station, capsys):
    db = copy_of(station, "held-many.sqlite")
    before = file_state(db)
    with StationLock(db):  # as a running daemon holds it
        status = main(["replay", str(station.clean), str(station.redone), "--db", str(db)])
        captured = capsys.readouterr()
    assert status == 2 and captured.out == ""
    (said,) = captured.err.strip().splitlines()
    assert "the replay cannot be stored" in said and "--dry-run" in said
    assert file_state(db) == before


def test_a_session_given_twice_is_replayed_once_and_the_run_is_counted(station: Station, capsys):
    clean = str(station.clean)
    assert main(["replay", clean, clean, "--db", str(station.db), "--dry-run", "--speed", "0"]) == 0
    out = capsys.readouterr().out
    assert out.count("reproduced exactly") >= 1
    assert "the sessions given: 1 session(s), 1 replayed, 1 reproduced exactly" in out


# ---------------------------------------------------------------------------- bad requests
def replay_in_process(capsys, db: Path, session_id: int, *options: str) -> tuple[int, str]:
    """Run `chargebook replay` in this process (for refusals, which start nothing)."""
    status = main(["replay", str(session_id), "--db", str(db), *options])
    captured = capsys.readouterr()
    assert captured.out == ""
    return status, captured.err


def test_an_unknown_or_still_open_session_is_refused_and_nothing_is_written(
    station: Station, capsys
):
    db = copy_of(station, "bad-session.sqlite")
    status, message = replay_in_process(capsys, db, 99, "--speed", "0")
    assert status == 2 and "no session with id 99" in message
    with Store.open(db) as store:
        row = store.session(station.clean)
        open_id = store.create_session(row.metadata(), row.plan(), row.convention, row.beam)
    before = file_state(db)
    status, message = replay_in_process(capsys, db, open_id, "--speed", "0")
    assert status == 2 and f"session {open_id} is still open" in message
    assert file_state(db) == before


def test_a_replay_into_a_station_file_a_daemon_holds_is_refused_naming_it(station: Station, capsys):
    db = copy_of(station, "held.sqlite")
    before = file_state(db)
    with StationLock(db):  # as a running daemon holds it
        status, message = replay_in_process(capsys, db, station.clean, "--speed", "0")
        assert status == 2 and "the replay cannot be stored" in message
        assert f"in use by another chargebook daemon (pid {os.getpid()})" in message
        assert "--dry-run replays without writing anything" in message
        assert file_state(db) == before
        # a dry run writes nothing, so the daemon's hold does not stop it
        dry = replay(db, station.clean, "--speed", "0", "--dry-run", "--json")
        assert dry.returncode == 0, dry.stderr
        assert json.loads(dry.stdout)["reproduced"] is True
    assert file_state(db) == before


def test_a_session_recorded_before_the_input_log_is_refused_saying_why(station: Station, capsys):
    db = copy_of(station, "before-the-input-log.sqlite")
    conn = sqlite3.connect(db)
    with conn:  # the session as an older chargebook left it: no input log
        conn.execute("DROP TRIGGER inputs_refuse_delete")
        conn.execute("DELETE FROM inputs WHERE session_id = ?", (station.clean,))
    conn.close()
    before = file_state(db)
    status, message = replay_in_process(capsys, db, station.clean, "--speed", "0")
    assert status == 2
    assert f"session {station.clean} was recorded before the input log" in message
    assert "cannot be replayed exactly" in message
    assert file_state(db) == before


@pytest.mark.parametrize(
    ("options", "named"),
    [
        (["--threshold", "relative_sd=0.1"], "thresholds.relative_sd"),
        (["--threshold", "relative_sd_pct"], "--threshold"),
        (["--speed", "-1"], "--speed"),
        (["--time-scale", "0"], "--time-scale"),
        (["--plan", "no-such-plan"], "plan"),
        (["--profile", "no-such-profile"], "no-such-profile"),
    ],
)
def test_bad_options_are_refused_naming_them(station: Station, capsys, options, named):
    before = file_state(station.db)
    status, message = replay_in_process(capsys, station.db, station.clean, *options)
    assert status == 2 and named in message and "nothing was written" in message
    assert file_state(station.db) == before
