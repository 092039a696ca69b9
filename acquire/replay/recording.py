"""What a replay needs from a recorded session, read from the station database.

A :class:`Recording` holds the session's raw traffic (every line sent and received, with its
receive time ``t_s`` on the daemon's clock) and its input log (``acquire/engine/inputs.py``):
every input that changed the session, in the order the engine applied it, each placed at the
point of the traffic where it was applied. Nothing is inferred from the session's effects: the
readings and results are what the replay must produce again, so they are not read here
(``replay_compare`` reads them to compare).

Where an input happened: every traffic line and every input has its place in the session's
chain (``chain_seq``, see ``chain``), in the order they were written. An input's ``position`` is
the number of the session's traffic lines before it in that order, so the replay applies it
after exactly those lines. A sample names the traffic line it was parsed from (``line_id``): it
is applied right after that line; a run of samples (``sample_run``) names its consecutive lines,
and is applied right after the last. The places do not depend on the wall clock.

A session recorded before the input log (migration ``input_log``) has no log to feed back: its
log does not begin with its ``session_start``, and it is refused in words.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from chargebook.acquire.engine import inputs
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import (
    EventRow,
    SessionRow,
    Store,
    TrafficRow,
    json_object,
)
from chargebook.acquire.session import rules
from chargebook.corrections.stability import Thresholds

#: Session statuses a replay accepts: the session is over, nothing writes to it any more.
REPLAYABLE_STATUSES = ("finished", "aborted", "interrupted")


class NotReplayable(Exception):
    """The session cannot be replayed as asked; the message says why and what to do."""


@dataclass(frozen=True, slots=True)
class RecordedLine:
    """One raw line of the session's traffic: position, receive time (s), direction, bytes."""

    index: int
    t_s: float
    direction: str
    raw: bytes


@dataclass(frozen=True, slots=True)
class LoggedInput:
    """One input of the session's log, at its place in the traffic.

    ``position``: the lines played before it is applied; ``line``: for a sample, the index of
    the traffic line it was parsed from, for a run of samples the index of its first line (None
    for other inputs); ``count``: the lines of a run (1 for a sample); ``input_id``: its row in
    the log, to name it.
    """

    position: int
    given: inputs.Input
    input_id: int
    line: int | None = None
    count: int = 1

    @property
    def lines(self) -> range:
        """Return the indexes of the traffic lines its samples were parsed from (none for an
        input that is not a sample)."""
        return range(0) if self.line is None else range(self.line, self.line + self.count)


@dataclass(frozen=True)
class Recording:
    """Everything a replay of one session is built from (see the module docstring)."""

    session: SessionRow
    thresholds: Thresholds
    profile: str | None
    time_scale: float | None
    lines: tuple[RecordedLine, ...]
    start: inputs.StartSession
    inputs: tuple[LoggedInput, ...]  # every logged input after the session's start
    places: tuple[int, ...]  # each line's place in the session's chain (0: before the session)
    #: The session's readings' ids, in the order taken: an input naming a reading (a short
    #: delivery) names the replay's reading at the same place.
    reading_ids: tuple[int, ...] = ()

    @property
    def session_id(self) -> int:
        return self.session.id

    @property
    def sample_lines(self) -> frozenset[int]:
        """Return the indexes of the lines whose samples the engine consumed."""
        return frozenset(line for logged in self.inputs for line in logged.lines)


def before_the_input_log(session_id: int) -> str:
    """Return why a session recorded before the input log cannot be replayed, in words."""
    return (
        f"session {session_id} was recorded before the input log (by a chargebook without "
        "migration input_log), so it cannot be replayed exactly: a replay feeds back the "
        "inputs the engine took, and this session has no record of them"
    )


def load_recording(store: Store, session_id: int) -> Recording:
    """Return the recording of session ``session_id``.

    Raises NotFound for an unknown session and NotReplayable for one that is still open or
    was recorded before the input log.
    """
    session = store.session(session_id)
    if session.status not in REPLAYABLE_STATUSES:
        raise NotReplayable(
            f"session {session_id} is still {session.status}: a daemon may still be writing to "
            "it; replay it once it is finished or aborted"
        )
    logged = store.placed_inputs(session_id)  # (id, kind, actor, detail, place) each
    if not logged or logged[0][1] != inputs.StartSession.kind:
        raise NotReplayable(before_the_input_log(session_id))
    events = store.events(session_id)
    placed = store.placed_traffic(session_id)  # (id, t_s, direction, line, place) each
    first = [TrafficRow(p[0], session_id, p[1], "", p[2], p[3]) for p in placed[:1]]
    before = exchange_before(store, first)  # outside the session: place 0
    line_ids = [row.id for row in before] + [p[0] for p in placed]
    lines = tuple(
        RecordedLine(index, t_s, direction, raw)
        for index, (t_s, direction, raw) in enumerate(
            [*((r.t_s, r.direction, r.line) for r in before), *(p[1:4] for p in placed)]
        )
    )
    places = (0,) * len(before) + tuple(p[4] for p in placed)
    profile, time_scale = _acquisition(events)
    _, kind, actor, detail, _ = logged[0]
    start = inputs.from_logged(kind, actor, json_object(detail))
    assert isinstance(start, inputs.StartSession)
    return Recording(
        session=session,
        thresholds=rules.session_thresholds(events),
        profile=profile,
        time_scale=time_scale,
        lines=lines,
        start=start,
        inputs=tuple(placed_inputs(session_id, logged[1:], lines, line_ids, places)),
        places=places,
        reading_ids=tuple(row.id for row in store.readings(session_id)),
    )


#: A logged input as :meth:`Store.placed_inputs` gives it: (id, kind, actor, detail as JSON
#: text, place in the session's chain).
LoggedRow = tuple[int, str, str, str, int]


def placed_inputs(
    session_id: int,
    logged: Sequence[LoggedRow],
    lines: Sequence[RecordedLine],
    line_ids: Sequence[int],
    places: Sequence[int],
) -> list[LoggedInput]:
    """Return the logged inputs of session ``session_id``, in order, each placed after the
    traffic lines before it in the session's chain (``line_ids`` and ``places``: each line's
    row id and place), a sample right after the line it names, a run of samples after its last
    line. NotReplayable for a sample naming a line the session did not receive."""
    line_index: dict[int | None, int] = {row_id: index for index, row_id in enumerate(line_ids)}
    found: list[LoggedInput] = []
    position = 0
    for row in logged:
        given = _logged_input(session_id, row)
        line, count = None, 1
        if isinstance(given, inputs.Sample | inputs.SampleRun):
            named = given.line_ids if isinstance(given, inputs.SampleRun) else [given.line_id]
            line = _received_lines(session_id, row[0], named, line_index, lines, line_ids)
            count = len(named)
            position = max(position, line + count)
        else:
            while position < len(places) and places[position] < row[4]:
                position += 1
        found.append(LoggedInput(position, given, row[0], line, count))
    return found


def _logged_input(session_id: int, row: LoggedRow) -> inputs.Input:
    """Return the input a row of the log holds; NotReplayable, in words, for a row whose detail
    is not what its kind holds (a field missing, unknown, or of another type: edited by hand,
    which ``verify`` names too)."""
    row_id, kind, actor, detail, _ = row
    try:
        if kind == inputs.Sample.kind:  # most of a query-mode log: one a poll
            return _logged_sample(actor, _detail(detail))
        given = inputs.from_logged(kind, actor, _detail(detail))
        if isinstance(given, inputs.SampleRun):
            _check_sample_fields(given)
    except (TypeError, ValueError) as error:
        raise NotReplayable(
            f"input {row_id} of session {session_id} ({kind}) cannot be read from the "
            f"input log: {error} (`chargebook verify {session_id}` checks the record)"
        ) from None
    return given


#: Decodes one JSON value at the start of a text: (the value, where it ends).
_DECODE = json.JSONDecoder().raw_decode


def _detail(text: str) -> Any:
    """Return the value of a logged input's detail (JSON text): json.loads's, without its
    steps around the decoding (a query-mode session logs one input a poll); ValueError, as
    json.loads says it, where the text is not one JSON value."""
    try:
        value, end = _DECODE(text)
    except ValueError:
        end = -1
    return value if end == len(text) else json_object(text)


def _logged_sample(actor: str, detail: dict[str, Any]) -> inputs.Sample:
    """Return the sample a logged detail holds, its values checked as
    :func:`_check_sample_fields` checks them (TypeError or ValueError where they are not)."""
    given = inputs.Sample(actor=actor, **detail)
    line_id = given.line_id
    if not (
        type(given.t_s) is float
        and type(given.charge_nC) is float
        and type(given.status) is str
        and (line_id is None or (type(line_id) is int and line_id >= 1))
    ):
        _check_sample_fields(given)  # an integer value, or one that names what is wrong
    return given


def _check_sample_fields(given: inputs.Sample | inputs.SampleRun) -> None:
    """Raise TypeError unless a logged sample's or run's values have the types replay reads."""
    numbers = {"t_s": given.t_s, "charge_nC": given.charge_nC}
    if isinstance(given, inputs.SampleRun):
        wholes = {"first_line_id": given.first_line_id, "count": given.count}
        texts = {"digest": given.digest, "status": given.status}
    else:
        wholes = {} if given.line_id is None else {"line_id": given.line_id}
        texts = {"status": given.status}
    for name, value in numbers.items():
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise TypeError(f"{name} is {value!r}, not a number")
    for name, value in wholes.items():
        if isinstance(value, bool) or not isinstance(value, int) or value < 1:
            raise TypeError(f"{name} is {value!r}, not a whole number of at least 1")
    for name, value in texts.items():
        if not isinstance(value, str):
            raise TypeError(f"{name} is {value!r}, not text")


def _received_lines(
    session_id: int,
    input_id: int,
    named: Sequence[int | None],
    line_index: dict[int | None, int],
    lines: Sequence[RecordedLine],
    line_ids: Sequence[int],
) -> int:
    """Return the index of the first of the traffic lines (row ids ``named``) a logged sample
    or run names (``line_ids``: each line's row id); NotReplayable where one is not a line the
    session received, right after the one before it."""
    first = line_index.get(named[0]) if named else None
    for offset, line_id in enumerate(named):
        index = -1 if first is None else first + offset
        if not (0 <= index < len(lines) and line_ids[index] == line_id) or (
            lines[index].direction != "rx"
        ):
            raise NotReplayable(
                f"input {input_id} of session {session_id} is a sample of traffic line id "
                f"{line_id}, which is not a line the session received"
            )
    if first is None:
        raise NotReplayable(f"input {input_id} of session {session_id} names no traffic line")
    return first


def exchange_before(store: Store, traffic: Sequence[TrafficRow]) -> list[TrafficRow]:
    """Return the start of an exchange the session's traffic begins in the middle of.

    A session can start while the daemon is talking to the instrument (identifying it after
    connecting): the command then is recorded outside the session and its answer inside. The
    lines returned are those just before the session's first line, back to that command.
    """
    if not traffic or traffic[0].direction == "tx":
        return []
    before = [row for row in store.traffic(None) if row.id < traffic[0].id]
    run: list[TrafficRow] = []
    expected_id = traffic[0].id - 1
    for row in reversed(before):
        if row.id != expected_id:
            break
        run.insert(0, row)
        if row.direction == "tx":
            return run
        expected_id -= 1
    return []


def _acquisition(events: Sequence[EventRow]) -> tuple[str | None, float | None]:
    """Return (profile name, time scale) the daemon recorded, None where it did not."""
    profile: str | None = None
    for event in events:
        detail = event.detail()
        if event.kind == EventKind.ACQUISITION:
            profile = detail.get("profile") or profile
        elif event.kind == EventKind.INSTRUMENT_IDENTIFIED and profile is None:
            profile = detail.get("profile")
    return profile, rules.recorded_time_scale(events)


def traffic_positions(store: Store, recording: Recording) -> list[str]:
    """Return, for each count ``i`` of recorded lines (0 to all), where the session stood
    after its first ``i`` lines, in words ("in reading set 'routine' (attempt 1) after 2
    readings"), for messages about a traffic log that stops or fails there."""
    sets = {s.id: s for s in store.sets(recording.session_id)}
    places = recording.places
    events = store.events(recording.session_id)
    event_places = store.chain_places("events", recording.session_id)
    words: list[str] = []
    current = "before the first reading set"
    readings: dict[int, int] = {}
    event_index = 0
    for count in range(len(places) + 1):
        limit = places[count] if count < len(places) else None
        while event_index < len(events) and (
            limit is None or event_places[events[event_index].id] < limit
        ):
            current = _after_event(events[event_index], sets, readings, current)
            event_index += 1
        words.append(current)
    return words


def _after_event(
    event: EventRow, sets: dict[int, Any], readings: dict[int, int], current: str
) -> str:
    detail = event.detail()
    set_id = detail.get("set_id")
    reading_set = sets.get(set_id) if set_id is not None else None
    if reading_set is None:
        return current
    name = f"reading set '{reading_set.step_key}' (attempt {reading_set.attempt})"
    if event.kind == EventKind.READING_RECORDED:
        readings[set_id] = readings.get(set_id, 0) + 1
    taken = readings.get(set_id, 0)
    ended = detail.get("to") in ("accepted", "superseded", "aborted")
    if event.kind == EventKind.SET_STATUS and ended:
        return f"after {name} ended {detail['to']}"
    return f"in {name} after {taken} reading{'s' if taken != 1 else ''}"
