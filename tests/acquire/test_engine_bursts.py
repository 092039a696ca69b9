"""A burst of pushed samples taken in one call leaves what taking them one at a time leaves.

The reference is the engine's one-sample input (``Engine.apply(inputs.Sample(...))``, tested
against the capture rules in test_engine.py and test_capture.py), applied the way the daemon
applied it before bursts: in order, each burst's samples until one completes the reading (the
rest of that burst belonged to a reading already captured). :meth:`Engine.take_samples` must
leave the same state, the same record (readings, sets, events, the input log) and the same
samples waiting to be logged, bit for bit, for any recorded stream cut into any bursts.
"""

from __future__ import annotations

import re
from datetime import UTC, datetime

from chargebook.acquire.engine import inputs, sample_log
from chargebook.acquire.engine.capture import CaptureSettings, ReadingCapture
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.record.store import Store
from chargebook.drivers_generic.interface import Capability, ReadingStatus, Sample
from hypothesis import given, settings
from hypothesis import strategies as st
from test_engine import Clock, small_plan, started

PUSHES = {Capability.STREAM, Capability.PUSH_READINGS, Capability.ZERO, Capability.INTEGRATE}
#: What each table is compared by (the columns that do not hold the wall clock).
TABLES = {
    "readings": "id, set_id, seq, t_s, charge_nC, capture, settling, status, traffic_id",
    "reading_sets": "id, step_key, attempt, status, reason",
    "events": "id, kind, actor, detail_json, chain_seq",
    "inputs": "id, kind, actor, detail_json, chain_seq",
    "traffic": "id, t_s, line, chain_seq",
}


def _armed_engine() -> tuple[Engine, Clock]:
    clock = Clock()
    fixed = datetime(2026, 12, 3, 12, 0, tzinfo=UTC)
    engine = Engine(Store.memory(now=lambda: fixed), capabilities=PUSHES, clock=clock)
    started(engine, small_plan())
    if engine.pending_manual is not None:
        engine.manual_done(actor="operator A")
    engine.arm()
    return engine, clock


def _state(engine: Engine) -> dict:
    reading = engine.reading
    return {
        "state": engine.state,
        "reading": None if reading is None else dict(vars(reading), settings=None),
        "reading_status": (engine.reading_status, type(engine.reading_status)),
        "sample_line_id": engine.sample_line_id,
        "unlogged": sample_log.logged_entries(engine._unlogged_samples),
        "record": {
            table: [
                tuple(re.sub(r'"uuid": "[^"]*"', "", v) if isinstance(v, str) else v for v in row)
                for row in engine.store.conn.execute(f"SELECT {columns} FROM {table} ORDER BY id")
            ]  # each session has its own random uuid
            for table, columns in TABLES.items()
        },
    }


def _bursts(engine: Engine, clock: Clock, stream, cuts):
    """Return the stream as bursts: (clock_s, [(Sample, line id)]), the lines recorded."""
    session_id = engine.session_id
    t_s = clock.now
    bursts, burst = [], []
    for index, (dt, charge_nC, complete, status) in enumerate(stream):
        t_s += dt if dt >= 0 else 0.0
        at = t_s + dt if dt < 0 else t_s
        line_id = engine.store.add_traffic(session_id, at, "rx", f"{index}\n".encode())
        burst.append((Sample(at, charge_nC, ReadingStatus(status), complete, ""), line_id))
        if index in cuts:
            bursts.append((t_s, burst))
            burst = []
    bursts.append((t_s, burst))
    return bursts


@settings(max_examples=40, deadline=None)
@given(
    # each pushed sample: seconds after the previous one (negative: a stale line from before
    # the reading was armed), charge in nC, marked complete by the instrument, its status
    stream=st.lists(
        st.tuples(
            st.sampled_from([0.0, 0.05, 0.3, 1.2, -50.0]),
            st.sampled_from([0.0, 0.01, 5.0, 20.0, 20.001, 20.5, -20.0]),
            st.sampled_from([False] * 6 + [True]),
            st.sampled_from(["ok", "busy", "overrange"]),
        ),
        max_size=80,
    ),
    cuts=st.sets(st.integers(0, 80), max_size=10),
)
def test_a_burst_of_samples_leaves_what_one_sample_at_a_time_leaves(stream, cuts):
    one, one_clock = _armed_engine()
    many, many_clock = _armed_engine()
    for clock_s, burst in _bursts(one, one_clock, stream, cuts):
        reading = one.reading
        for sample, line_id in burst:
            if one.reading is not reading:
                break  # the rest belonged to a reading already captured
            one.apply(
                inputs.Sample(
                    t_s=sample.t_s,
                    charge_nC=sample.charge_nC,
                    complete=sample.complete,
                    status=sample.status.value,
                    line_id=line_id,
                    clock_s=clock_s,
                )
            )
    for clock_s, burst in _bursts(many, many_clock, stream, cuts):
        taken = many.take_samples([s for s, _ in burst], [i for _, i in burst], clock_s)
        assert taken == many.samples_taken <= len(burst)
    assert _state(many) == _state(one)
    # the samples logged by a capture are the ones a replay re-applies: the same inputs
    assert one.store.inputs(one.session_id)[-1].detail_json == (
        many.store.inputs(many.session_id)[-1].detail_json
    )


def test_a_burst_that_completes_a_reading_records_it_and_stops_there():
    engine, clock = _armed_engine()
    t_s = clock.now
    rising = [Sample(t_s + n * 0.1, 2.0 * n, ReadingStatus.OK, False, "") for n in range(11)]
    final = Sample(t_s + 1.2, 20.1, ReadingStatus.OK, True, "")  # pushed: complete
    after = Sample(t_s + 1.3, 0.0, ReadingStatus.OK, False, "")
    burst = [*rising, final, after]
    assert engine.take_samples(burst, [None] * len(burst), clock.now) == 12
    (reading,) = engine.store.readings(engine.session_id)
    assert (reading.charge_nC, reading.capture) == (20.1, "pushed")
    logged = [row for row in engine.store.inputs(engine.session_id) if row.kind == "sample"]
    assert len(logged) == 12  # the eleven that only moved the charge, then the one that ended it


@settings(max_examples=200, deadline=None)
@given(
    timed_s=st.sampled_from([None, 0.5, 2.0]),
    baseline_nC=st.sampled_from([None, 0.0]),
    stream=st.lists(
        st.tuples(
            st.sampled_from([0.0, 0.05, 0.3, 1.2, -50.0]),
            st.sampled_from([0.0, 0.01, 5.0, 20.0, 20.001, -20.0]),
            st.sampled_from([False] * 6 + [True]),
        ),
        max_size=40,
    ),
)
def test_a_run_fed_to_a_capture_leaves_what_feeding_one_at_a_time_leaves(
    timed_s, baseline_nC, stream
):
    # a timed integration (leakage, no beam) or a beam reading, from a zeroed integrator or not
    settings_ = CaptureSettings(hold_s=1.0)
    one = ReadingCapture(settings_, 100.0, timed_s=timed_s, baseline_nC=baseline_nC)
    run = ReadingCapture(settings_, 100.0, timed_s=timed_s, baseline_nC=baseline_nC)
    t_s, samples = 100.0, []
    for dt, charge_nC, complete in stream:
        t_s += max(dt, 0.0)
        samples.append(Sample(t_s + min(dt, 0.0), charge_nC, ReadingStatus.OK, complete, ""))
    captured, fed = None, 0
    for sample in samples:
        before = dict(vars(one))
        fed += 1
        captured = one.feed(sample.t_s, sample.charge_nC, sample.complete)
        if captured is not None:
            break
    assert run.feed_run(samples) == (fed, captured, before if captured else {})
    assert vars(run) == vars(one)
