"""The samples the engine took since its last logged input, and the input log's form of them.

A sample that only moves the charge writes nothing when it is taken; it is logged, in order,
with the next input that writes (see ``Engine.apply``). A streaming instrument brings tens of
thousands a second, so they are not logged one entry each: the samples parsed from consecutive
rows of the traffic table are one ``sample_run`` entry (:class:`inputs.SampleRun`: the rows,
the count, the last sample's values and a digest of them all). A lone sample, or one whose raw
line could not be recorded, is one ``sample`` entry with its own values, as before runs.

The engine keeps what it took as *chunks*, one per call that took samples: (the engine's clock
when it took them, the samples, the traffic row of each one's line). Nothing is made per sample
until the log is written, and then only for samples without a run.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from itertools import chain
from typing import Any

from chargebook.acquire.engine import inputs

#: Samples taken in one call: (clock_s, the samples, each one's traffic row or None, the
#: actor who gave them: the daemon, or a replay of it).
Chunk = tuple[float, Sequence[Any], Sequence[int | None], str]
#: An entry of the input log as ``Store.add_inputs`` takes it: (kind, actor, detail).
Entry = tuple[str, str, dict[str, Any]]


def sample_input(
    clock_s: float, sample: Any, line_id: int | None, actor: str = inputs.DAEMON_ACTOR
) -> inputs.Sample:
    """Return the input one sample stands for (``t_s`` in s, ``charge_nC``, ``complete``,
    ``status`` as text; ``line_id`` its traffic row), given by ``actor`` at ``clock_s`` (s)."""
    return inputs.Sample(
        actor=actor,
        t_s=sample.t_s,
        charge_nC=sample.charge_nC,
        complete=sample.complete,
        status=str(sample.status),
        line_id=line_id,
        clock_s=clock_s,
    )


def logged_entries(chunks: Sequence[Chunk]) -> list[Entry]:
    """Return the input-log entries for the samples of ``chunks``, in order: each run of samples
    on consecutive traffic rows (given by one actor) as one ``sample_run``, any other sample as
    one ``sample``."""
    entries: list[Entry] = []
    parts: list[Sequence[Any]] = []  # the samples of the run being gathered
    first_id = next_id = None  # the rows of its first sample and of the sample after its last
    clock_s, actor = 0.0, inputs.DAEMON_ACTOR
    for chunk_clock_s, samples, line_ids, chunk_actor in chunks:
        for start, stop, line_id in _spans(line_ids):
            if line_id is None or line_id != next_id or chunk_actor != actor:
                entries.extend(_run_entries(parts, first_id, clock_s, actor))
                parts, first_id, next_id, actor = [], line_id, line_id, chunk_actor
            if line_id is None:
                entries.append(_lone_entry(chunk_clock_s, samples[start], None, actor))
                continue
            parts.append(samples[start:stop])
            next_id = line_id + stop - start
            clock_s = chunk_clock_s
    entries.extend(_run_entries(parts, first_id, clock_s, actor))
    return entries


def _lone_entry(clock_s: float, sample: Any, line_id: int | None, actor: str) -> Entry:
    """Return the ``sample`` entry of one sample: the input the engine was given, where it
    was given one (``Engine.apply``, the same clock, row and actor), else one made for it."""
    if not (
        type(sample) is inputs.Sample
        and type(sample.status) is str
        and sample.clock_s == clock_s
        and sample.line_id == line_id
        and sample.actor == actor
    ):
        sample = sample_input(clock_s, sample, line_id, actor)
    return sample.kind, sample.actor, sample.fields()


def _spans(line_ids: Sequence[int | None]) -> Iterator[tuple[int, int, int | None]]:
    """Yield (start, stop, first row) of each stretch of ``line_ids`` that counts up by one (a
    row of None is a stretch of its own)."""
    if isinstance(line_ids, range) and line_ids.step == 1:  # as the daemon gives a burst's
        if line_ids:
            yield 0, len(line_ids), line_ids.start
        return
    start = 0
    for index in range(1, len(line_ids) + 1):
        previous = line_ids[index - 1]
        if index == len(line_ids) or previous is None or line_ids[index] != previous + 1:
            yield start, index, line_ids[start]
            start = index


def _run_entries(
    parts: list[Sequence[Any]], first_id: int | None, clock_s: float, actor: str
) -> list[Entry]:
    """Return the entry of the samples ``parts`` holds, on the rows from ``first_id``: none
    for no sample, a ``sample`` for one, a ``sample_run`` for more."""
    samples = parts[0] if len(parts) == 1 else list(chain.from_iterable(parts))
    if not samples or first_id is None:
        return []
    if len(samples) == 1:
        return [_lone_entry(clock_s, samples[0], first_id, actor)]
    last = samples[-1]
    run = inputs.SampleRun(
        actor=actor,
        clock_s=clock_s,
        first_line_id=first_id,
        count=len(samples),
        t_s=last.t_s,
        charge_nC=last.charge_nC,
        complete=bool(last.complete),
        status=str(last.status),
        digest=inputs.run_digest(samples),
    )
    return [(run.kind, run.actor, run.fields())]
