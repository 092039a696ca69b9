"""Samples that only moved the charge are logged as runs: one input-log entry per run of lines.

A streaming electrometer pushes thousands of lines a second; issue 11 asks that every sample the
engine consumed be in the input log, so a replay can feed the same inputs back and check that
the driver reads the same samples from the same lines. The log holds a run of them as one entry
(its lines, count, last sample and a digest); these tests check the entry against a digest
computed here from the documented layout (BLAKE2b of the IEEE 754 doubles, little-endian, as
Python's ``struct`` packs them), that the real daemon's flood logs O(1) entries and replays
exactly, and that a raw line or a log entry altered afterwards is reported by verify and replay.
The charges are the simulated electrometer's invented values.
"""

from __future__ import annotations

import asyncio
import hashlib
import shutil
import sqlite3
import struct
from pathlib import Path

import pytest
from chargebook.acquire.engine import inputs, sample_log
from chargebook.acquire.protocol import Method
from chargebook.acquire.record.store import Store
from chargebook.acquire.record.verify import verify_session
from chargebook.acquire.replay.recording import NotReplayable
from chargebook.acquire.replay.session_replay import ReplayRequest, replay_session
from chargebook.acquire.replay.traffic import Divergence
from chargebook.drivers_generic.interface import ReadingStatus, Sample
from test_engine_bursts import _armed_engine

from tests.bench.harness import QUIET_STREAM, collecting_daemon, last_traffic_id, read_db, station

FLOODED = 1_000


def expected_digest(samples: list[Sample]) -> str:
    """Return the digest the log's ``sample_run`` documents, computed independently."""
    digest = hashlib.blake2b(digest_size=16)
    digest.update(struct.pack(f"<{len(samples)}d", *(s.t_s for s in samples)))
    digest.update(struct.pack(f"<{len(samples)}d", *(s.charge_nC for s in samples)))
    digest.update(bytes(int(s.complete) for s in samples))
    digest.update("\n".join(s.status.value for s in samples).encode())
    return digest.hexdigest()


def _rising(engine, count: int, *, start_nC: float = 0.0) -> tuple[list[Sample], list[int]]:
    """Return ``count`` rising samples of a timed integration and their recorded raw lines."""
    t0 = engine.reading.armed_t_s
    samples = [
        Sample(t0 + 0.001 * n, start_nC + 0.01 * n, ReadingStatus.OK, False, "")
        for n in range(count)
    ]
    ids = [engine.store.add_traffic(engine.session_id, s.t_s, "rx", b"line\n") for s in samples]
    return samples, ids


def test_a_burst_of_a_thousand_samples_is_one_entry_of_the_input_log():
    engine, _ = _armed_engine()
    before = len(engine.store.inputs(engine.session_id))
    samples, ids = _rising(engine, FLOODED)
    for start in range(0, FLOODED, 250):  # four bursts, as the daemon reads them
        part = slice(start, start + 250)
        assert (
            engine.take_samples(samples[part], range(ids[part][0], ids[part][-1] + 1), 5.0) == 250
        )
    engine.pause()
    logged = engine.store.inputs(engine.session_id)[before:]
    assert [row.kind for row in logged] == ["sample_run", "pause"]
    detail = logged[0].detail()
    last = samples[-1]
    assert detail == {
        "clock_s": 5.0,
        "first_line_id": ids[0],
        "count": FLOODED,
        "t_s": last.t_s,
        "charge_nC": last.charge_nC,
        "complete": False,
        "status": "ok",
        "digest": expected_digest(samples),
    }
    assert isinstance(inputs.from_logged("sample_run", "daemon", detail), inputs.SampleRun)
    assert verify_session(engine.store, engine.session_id).verified


def test_samples_on_lines_apart_or_unrecorded_are_logged_apart_in_order():
    engine, _ = _armed_engine()
    before = len(engine.store.inputs(engine.session_id))
    samples, ids = _rising(engine, 6)
    engine.store.add_traffic(engine.session_id, samples[-1].t_s, "tx", b"Q?\n")  # between them
    later, later_ids = _rising(engine, 3, start_nC=1.0)
    line_ids = [ids[0], ids[1], None, *ids[3:], *later_ids]  # the third line was not recorded
    assert engine.take_samples([*samples, *later], line_ids, 5.0) == 9
    engine.pause()
    logged = [(r.kind, r.detail()) for r in engine.store.inputs(engine.session_id)[before:]]
    assert [
        (kind, d.get("first_line_id", d.get("line_id")), d.get("count")) for kind, d in logged
    ] == [
        ("sample_run", ids[0], 2),
        ("sample", None, None),
        ("sample_run", ids[3], 3),
        ("sample_run", later_ids[0], 3),
        ("pause", None, None),
    ]
    assert logged[1][1]["charge_nC"] == samples[2].charge_nC
    assert logged[2][1]["digest"] == expected_digest(samples[3:])


def test_a_lone_sample_is_logged_with_the_values_of_the_input_that_gave_it():
    given = inputs.Sample(
        actor="daemon (replayed)",
        clock_s=7.25,
        t_s=7.2,
        charge_nC=1.5,
        complete=True,
        status="overrange",
        line_id=12,
    )
    logged = {"clock_s": 7.25, "t_s": 7.2, "charge_nC": 1.5, "complete": True}
    logged |= {"status": "overrange", "line_id": 12}
    assert sample_log.logged_entries([(7.25, (given,), (12,), given.actor)]) == [
        ("sample", "daemon (replayed)", logged)
    ]
    # a driver's sample (its status a ReadingStatus), and an input given at another clock,
    # on another row or by another actor, are logged as the engine took them
    read = Sample(7.2, 1.5, ReadingStatus.OVERRANGE, True)
    for taken in (read, given):
        entries = sample_log.logged_entries([(8.5, (taken,), (14,), "daemon")])
        assert entries == [("sample", "daemon", logged | {"clock_s": 8.5, "line_id": 14})]
        assert type(entries[0][2]["status"]) is str


def test_a_logged_run_cannot_be_applied_without_its_samples():
    engine, _ = _armed_engine()
    run = inputs.SampleRun(first_line_id=1, count=2, t_s=1.0, charge_nC=1.0, digest="00")
    with pytest.raises(TypeError, match="take_samples"):
        engine.apply(run)


async def _flood_then_abort(world, count: int) -> None:
    client = await collecting_daemon(world)
    try:
        first = last_traffic_id(world.db)
        with world.bench() as bench:
            bench.flood(0, count)
            while last_traffic_id(world.db) - first < count:
                await asyncio.sleep(0.05)
        await _engine_caught_up(client)
        await client.call(Method.SESSION_PAUSE)
        await client.call(Method.SESSION_ABORT, reason="flood recorded", confirm=True)
    finally:
        await client.close()


async def _engine_caught_up(client) -> None:
    """Wait until the engine has taken the last committed lines: a line is committed before
    the engine hears of it, so a pause sent as soon as the last one is on disk can reach the
    engine before that line's sample, which the paused reading then never takes. The flood is
    over, so the live reading stops moving once the engine has them all."""
    before = None
    while True:
        live = (await client.status())["live"]
        now = (live["elapsed_s"], live["charge_nC"])
        if now == before:
            return
        before = now
        await asyncio.sleep(0.25)


def _record_flood(target: Path) -> tuple[Path, int]:
    """Record a flood of pushed lines with the real daemon into ``target``; return it and the
    id of its session (aborted after a pause)."""
    with station("runs", "push-exponent", *QUIET_STREAM) as world:
        asyncio.run(_flood_then_abort(world, FLOODED))
        world.stop_daemon()
        shutil.copyfile(world.db, target)
    session_id = read_db(target, "SELECT max(id) FROM sessions")[0][0]
    return target, session_id


@pytest.fixture(scope="module")
def flooded(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, int]:
    """Return a station file where the real daemon took a flood of pushed lines, and the id of
    its session."""
    return _record_flood(tmp_path_factory.mktemp("runs") / "station.sqlite")


#: Loaded by the daemon's interpreter at start-up (``sitecustomize``): it logs every sample as
#: its own entry, as chargebook did before runs, so the file is one of the previous version.
ONE_ENTRY_A_SAMPLE = """
from chargebook.acquire.engine import sample_log


def logged_entries(chunks):
    return [
        (given.kind, given.actor, given.fields())
        for clock_s, samples, line_ids, actor in chunks
        for given in map(sample_log.sample_input, [clock_s] * len(samples), samples, line_ids,
                         [actor] * len(samples))
    ]


sample_log.logged_entries = logged_entries
"""


def _tampered(flooded: tuple[Path, int], tmp_path: Path, *statements: str) -> Path:
    """Return a copy of the flooded file changed by ``statements``, as a local user could."""
    copy = tmp_path / "tampered.sqlite"
    shutil.copyfile(flooded[0], copy)
    connection = sqlite3.connect(copy)
    with connection:
        for statement in statements:
            connection.execute(statement)
    connection.close()
    return copy


def _run_entry(db: Path, session_id: int) -> tuple[int, int, int]:
    """Return (input id, first line id, count) of the session's largest logged run."""
    with Store.open(db, read_only=True) as store:
        runs = [r for r in store.inputs(session_id) if r.kind == "sample_run"]
    row = max(runs, key=lambda r: r.detail()["count"])
    return row.id, row.detail()["first_line_id"], row.detail()["count"]


@pytest.mark.e2e
def test_a_flooded_session_logs_o1_entries_and_replays_exactly(flooded):
    db, session_id = flooded
    with Store.open(db, read_only=True) as store:
        logged = store.inputs(session_id)
        assert verify_session(store, session_id).verified
    kinds = [row.kind for row in logged]
    assert kinds.count("sample") + kinds.count("sample_run") <= 3  # not one per line
    assert _run_entry(db, session_id)[2] >= FLOODED
    report = replay_session(ReplayRequest(db, session_id, speed=0, dry_run=True))
    assert report.reproduced, report.comparison.to_dict()


@pytest.mark.e2e
def test_a_file_logged_one_entry_a_sample_still_verifies_and_replays_exactly(tmp_path):
    (tmp_path / "site").mkdir()
    (tmp_path / "site" / "sitecustomize.py").write_text(ONE_ENTRY_A_SAMPLE)
    with pytest.MonkeyPatch.context() as patch:
        patch.setenv("PYTHONPATH", str(tmp_path / "site"))
        db, session_id = _record_flood(tmp_path / "station.sqlite")
    with Store.open(db, read_only=True) as store:
        kinds = [row.kind for row in store.inputs(session_id)]
        assert verify_session(store, session_id).verified
    assert kinds.count("sample") >= FLOODED and "sample_run" not in kinds
    report = replay_session(ReplayRequest(db, session_id, speed=0, dry_run=True))
    assert report.reproduced, report.comparison.to_dict()


@pytest.mark.e2e
def test_an_altered_raw_line_of_a_run_is_reported_by_verify_and_replay(flooded, tmp_path):
    db, session_id = flooded
    _, first_line_id, count = _run_entry(db, session_id)
    line_id = first_line_id + count // 2
    (line,) = read_db(db, "SELECT line FROM traffic WHERE id = ?", (line_id,))[0]
    changed = line.replace(b"E", b"1E", 1)  # one more digit in the charge's mantissa
    assert changed != line
    copy = _tampered(
        flooded,
        tmp_path,
        "DROP TRIGGER traffic_refuse_update",
        f"UPDATE traffic SET line = x'{changed.hex()}' WHERE id = {line_id}",
    )
    with Store.open(copy, read_only=True) as store:
        problems = verify_session(store, session_id).problems
    assert problems and any(p.table == "traffic" and p.row_id == line_id for p in problems)
    with pytest.raises(Divergence, match="digest"):
        replay_session(ReplayRequest(copy, session_id, speed=0, dry_run=True))


def _run_entry_edited(flooded: tuple[Path, int], tmp_path: Path, edit: str) -> tuple[int, Path]:
    """Return the id of the flooded session's largest run entry and a copy of the file where
    its detail is ``edit`` (an SQL expression of ``detail_json``), as a local user could."""
    input_id, _, _ = _run_entry(*flooded)
    copy = _tampered(
        flooded,
        tmp_path,
        "DROP TRIGGER inputs_refuse_update",
        f"UPDATE inputs SET detail_json = {edit} WHERE id = {input_id}",
    )
    return input_id, copy


@pytest.mark.e2e
def test_an_altered_run_entry_is_reported_by_verify_and_replay(flooded, tmp_path):
    session_id = flooded[1]
    input_id, copy = _run_entry_edited(
        flooded, tmp_path, "json_set(detail_json, '$.digest', '0123456789abcdef0123456789abcdef')"
    )
    with Store.open(copy, read_only=True) as store:
        problems = verify_session(store, session_id).problems
    assert problems and any(p.table == "inputs" and p.row_id == input_id for p in problems)
    with pytest.raises(Divergence, match=f"input {input_id}.*digest"):
        replay_session(ReplayRequest(copy, session_id, speed=0, dry_run=True))


@pytest.mark.parametrize(
    ("edit", "named"),
    [
        ("json_set(detail_json, '$.count', 'ten')", "count is 'ten'"),
        ("json_set(detail_json, '$.count', 1.5)", "count is 1.5"),
        ("json_set(detail_json, '$.first_line_id', json('null'))", "first_line_id is None"),
        ("json_remove(detail_json, '$.digest')", "digest"),
    ],
)
def test_a_run_entry_edited_out_of_shape_is_refused_in_words(flooded, tmp_path, edit, named):
    session_id = flooded[1]
    input_id, copy = _run_entry_edited(flooded, tmp_path, edit)
    with pytest.raises(NotReplayable, match=f"input {input_id} .*sample_run.*{named}"):
        replay_session(ReplayRequest(copy, session_id, speed=0, dry_run=True))
