"""What a replay needs from a recorded session, read from the station database.

A :class:`Recording` holds the session's raw traffic (every line sent and received, with its
receive time ``t_s`` on the daemon's clock), the inputs the engine had that did not come over the
wire (the operator's actions, and the instrument going away and coming back), each placed at the
point of the traffic where it happened, and the time each recorded reading was armed. Nothing
else: the readings and results of the session are what the replay must produce again, so they
are not read here (``replay_compare`` reads them to compare).

Where an input happened: every traffic line and every event has its place in the session's
chain (``chain_seq``, see ``chain``), in the order they happened. An input's ``position`` is the
number of the session's traffic lines before its event in that order, so the replay applies it
after exactly those lines. The places do not depend on the wall clock: a clock stepped back
during the session (``recorded_at`` going backwards) does not move an input.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from chargebook.acquire.protocol import Method
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import EventRow, SessionRow, Store, TrafficRow
from chargebook.acquire.session import rules
from chargebook.corrections.stability import Thresholds

#: Session statuses a replay accepts: the session is over, nothing writes to it any more.
REPLAYABLE_STATUSES = ("finished", "aborted", "interrupted")

#: The operator actions, by the ``action`` their ``state_changed`` event names.
ACTIONS_BY_STATE_CHANGE: dict[str, str] = {
    Method.STEP_ARM: "arm",
    Method.STEP_SKIP: "skip",
    Method.SET_ACCEPT: "accept",
    Method.SET_REDO: "redo",
    Method.SESSION_PAUSE: "pause",
    Method.SESSION_RESUME: "resume",
    Method.SESSION_STOP: "stop",
    Method.SESSION_ABORT: "abort",
    Method.SESSION_CLOSE: "close",
}
#: Inputs that are events of their own kind.
ACTIONS_BY_EVENT_KIND: dict[str, str] = {
    EventKind.ENVIRONMENT_ENTERED: "environment",
    EventKind.MANUAL_STEP_DONE: "manual_done",
    EventKind.INSTRUMENT_LOST: "instrument_lost",
    EventKind.INSTRUMENT_FAULT: "instrument_fault",
    EventKind.SESSION_RESUMED: "restart",
}


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
class RecordedInput:
    """One input to the engine that did not come over the wire, at its place in the traffic.

    ``kind`` is an operator action (``arm``, ``accept``, ``redo``, ``environment`` ...) or an
    instrument input (``instrument_lost``, ``instrument_fault``, ``instrument_back``,
    ``restart``); ``detail`` is its recorded event's detail.
    """

    position: int
    kind: str
    actor: str
    detail: dict[str, Any]
    event_id: int


@dataclass(frozen=True)
class Recording:
    """Everything a replay of one session is built from (see the module docstring)."""

    session: SessionRow
    thresholds: Thresholds
    profile: str | None
    time_scale: float | None
    lines: tuple[RecordedLine, ...]
    inputs: tuple[RecordedInput, ...]
    places: tuple[int, ...]  # each line's place in the session's chain (0: before the session)
    armed_times_s: tuple[float, ...]
    armed_times_recorded: bool
    captured_times_s: frozenset[float]  # when each reading was taken: its sample's time
    start_actor: str

    @property
    def session_id(self) -> int:
        return self.session.id


def load_recording(store: Store, session_id: int) -> Recording:
    """Return the recording of session ``session_id``.

    Raises NotFound for an unknown session and NotReplayable for one that is still open.
    """
    session = store.session(session_id)
    if session.status not in REPLAYABLE_STATUSES:
        raise NotReplayable(
            f"session {session_id} is still {session.status}: a daemon may still be writing to "
            "it; replay it once it is finished or aborted"
        )
    events = store.events(session_id)
    traffic = store.traffic(session_id)
    traffic = [*exchange_before(store, traffic), *traffic]
    line_places = store.chain_places("traffic", session_id)
    places = tuple(line_places.get(row.id, 0) for row in traffic)
    event_places = store.chain_places("events", session_id)
    profile, time_scale = _acquisition(events)
    armed, armed_recorded = armed_times(events, store, session_id)
    captured = _capture_times(store, session_id)
    created = next((e for e in events if e.kind == EventKind.SESSION_CREATED), None)
    return Recording(
        session=session,
        thresholds=rules.session_thresholds(events),
        profile=profile,
        time_scale=time_scale,
        lines=tuple(
            RecordedLine(index, row.t_s, row.direction, row.line)
            for index, row in enumerate(traffic)
        ),
        inputs=tuple(recorded_inputs(events, event_places, traffic, places, captured)),
        places=places,
        armed_times_s=armed,
        armed_times_recorded=armed_recorded,
        captured_times_s=frozenset(captured.values()),
        start_actor=created.actor if created is not None else "daemon",
    )


def _capture_times(store: Store, session_id: int) -> dict[int, float]:
    """Return each reading's time (s): the receive time of the sample it was taken from."""
    return {reading.id: reading.t_s for reading in store.readings(session_id)}


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


def armed_times(
    events: Sequence[EventRow], store: Store, session_id: int
) -> tuple[tuple[float, ...], bool]:
    """Return the arming time (s) of each recorded reading, in order, and whether every one
    was recorded as such (older sessions only give capture time minus integration time)."""
    times: list[float] = []
    exact = True
    captured = {r.id: r.t_s for r in store.readings(session_id)}
    for event in events:
        if event.kind != EventKind.READING_RECORDED:
            continue
        detail = event.detail()
        if "armed_t_s" in detail:
            times.append(float(detail["armed_t_s"]))
        else:
            exact = False
            t_s = captured.get(int(detail["reading_id"]), math.nan)
            times.append(t_s - float(detail.get("integration_s", 0.0)))
    return tuple(times), exact


def recorded_inputs(
    events: Sequence[EventRow],
    event_places: Mapping[int, int],
    traffic: Sequence[TrafficRow],
    places: Sequence[int],
    captured_at: dict[int, float] | None = None,
) -> list[RecordedInput]:
    """Return the engine's inputs that are not traffic, each placed after the traffic lines
    before it in the session's chain (``event_places``: event id -> place; ``places``: each
    line's place; see the module docstring).

    A capture by hand is placed exactly: right after the line of the sample it took
    (``captured_at``: reading id -> its time, the sample's receive time). A sample written just
    before the operator's request may reach the engine just after it; the reading says which
    sample the engine had.
    """
    received = {row.t_s: index for index, row in enumerate(traffic) if row.direction == "rx"}
    inputs: list[RecordedInput] = []
    position = 0
    lost = False
    for event in events:
        kind = input_kind(event, lost)
        if kind is None:
            continue
        lost = kind in ("instrument_lost", "instrument_fault", "restart") or (
            lost and kind != "instrument_back"
        )
        while position < len(places) and places[position] < event_places[event.id]:
            position += 1
        placed = position
        if kind == "capture" and captured_at is not None:
            sample = received.get(captured_at.get(event.detail().get("reading_id"), math.nan))
            if sample is not None:
                placed = max(sample + 1, inputs[-1].position if inputs else 0)
        inputs.append(RecordedInput(placed, kind, event.actor, event.detail(), event.id))
    return inputs


def input_kind(event: EventRow, instrument_away: bool) -> str | None:
    """Return the input an event records (see RecordedInput.kind), or None for an outcome.

    ``instrument_back`` is an input only after the instrument was lost or the daemon
    restarted: the first connection of the daemon is not part of the session's sequence.
    """
    if event.kind == EventKind.STATE_CHANGED:
        return ACTIONS_BY_STATE_CHANGE.get(event.detail().get("action", ""))
    if event.kind == EventKind.READING_RECORDED and event.detail().get("capture") == "manual":
        return "capture"
    if event.kind == EventKind.INSTRUMENT_BACK:
        return "instrument_back" if instrument_away else None
    return ACTIONS_BY_EVENT_KIND.get(event.kind)


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
