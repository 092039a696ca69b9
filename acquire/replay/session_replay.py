"""Replaying a recorded session through the whole pipeline, to reproduce it or to ask "what if".

``chargebook replay SESSION`` plays the session's recorded raw traffic through the simulated
electrometer in playback mode (``chargebook simulate --playback``: a process of its own, on a
real pseudo-terminal), reads it with the real driver of the session's profile, interprets it
with the real engine, stores it with the real store, and compares the new session with the
original, reading by reading and result by result (``replay_compare``).

What makes it exact: the engine's state changes only by the inputs it is given, and the session's
input log holds every one of them with the engine's clock when it was applied (see
``chargebook.acquire.engine.inputs``). The replay feeds them back in order, each after the
traffic lines recorded before it (``replay_conductor``); the samples are parsed again by the
real driver from the played-back bytes and must match the logged ones, so an unchanged replay
gives bit-identical numbers. Nothing is inferred from the session's effects.

What if: another plan (``plan``) or other thresholds (``thresholds``) run the same recording
through an engine set up differently; the comparison then says what differs and why. A
threshold only changes flags; a plan may ask for what the recording does not hold (a reading
more than was taken), and then the replay stops there and says so.

Nothing is written to the station database unless the replay ran to the end: the engine writes
the replayed session through the store's API, as a new session with ``replay_of`` set to the
original's id, all in one transaction that is rolled back unless the replay is to be kept (a dry
run writes to a scratch store in memory instead). The replay holds the station's lock meanwhile,
and refuses a station file that a running daemon holds, naming it. A corrupted or truncated
traffic log is refused before anything runs.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from chargebook.acquire.record.events import EventKind, Replay, ReplayNotReproduced
from chargebook.acquire.record.store import Store
from chargebook.acquire.replay.compare import (
    TRAFFIC_LOG_DIFFERS,
    Change,
    Comparison,
    Explanations,
    compare_sessions,
    plan_changes,
    threshold_changes,
    traffic_differences,
)
from chargebook.acquire.replay.pipeline import PipelineRun, Setup, run_pipeline
from chargebook.acquire.replay.recording import (
    NotReplayable,
    Recording,
    load_recording,
    traffic_positions,
)
from chargebook.acquire.replay.traffic import (
    Divergence,
    TrafficLogError,
    read_traffic_log,
    write_playback_log,
)
from chargebook.acquire.session.stored_result import stored_row

__all__ = [
    "Divergence",
    "NotReplayable",
    "ReplayReport",
    "ReplayRequest",
    "StationReplays",
    "TrafficLogError",
    "replay_session",
    "save_traffic_log",
]


@dataclass(frozen=True)
class ReplayRequest:
    """What to replay, and how. ``speed`` 0 runs as fast as the pipeline allows.

    ``plan`` (a plan name or TOML path) and ``thresholds`` (threshold names and values laid
    over the session's own) make it a what-if replay;
    ``traffic_log`` plays a JSON-lines log in place of the stored traffic; ``profile`` and
    ``time_scale`` override what the session recorded; ``dry_run`` writes nothing; ``keep``
    stores an unchanged replay of a ``traffic_log`` even when it does not reproduce the
    session (marked so by a ``replay_not_reproduced`` event): without it such a replay is
    compared, never stored.
    """

    db_path: Path
    session_id: int
    speed: float = 1.0
    plan: str | None = None
    thresholds: dict[str, Any] = field(default_factory=dict)
    traffic_log: Path | None = None
    profile: str | None = None
    time_scale: float | None = None
    dry_run: bool = False
    keep: bool = False


@dataclass
class ReplayReport:
    """How a replay went: the sessions, the comparison, and why it stopped if it did."""

    original_id: int
    replay_id: int | None
    profile: str
    speed: float
    traffic_lines: int
    comparison: Comparison
    what_if: bool
    stopped: str | None = None
    traffic_notes: list[str] = field(default_factory=list)
    #: Why a replay that ran to the end was not stored (None: it was stored, or not asked to).
    not_stored: str | None = None

    @property
    def reproduced(self) -> bool:
        """Return True for an unchanged replay that reproduced everything exactly."""
        return not self.what_if and self.stopped is None and self.comparison.exact

    def to_dict(self) -> dict[str, Any]:
        """Return the report as JSON-ready data."""
        return {
            "original_session_id": self.original_id,
            "replay_session_id": self.replay_id,
            "profile": self.profile,
            "speed": self.speed,
            "traffic_lines": self.traffic_lines,
            "what_if": self.what_if,
            "reproduced": self.reproduced,
            "stopped": self.stopped,
            "traffic_notes": self.traffic_notes,
            "not_stored": self.not_stored,
            **self.comparison.to_dict(),
        }


def replay_session(request: ReplayRequest) -> ReplayReport:
    """Replay one stored session as asked; return the report.

    Raises NotFound for an unknown session, NotReplayable (TrafficLogError for a corrupted or
    truncated log; a station file a running daemon holds) and InputError for what cannot be
    replayed as asked, Divergence when an unchanged replay does not follow its recording. None
    of these writes anything.
    """
    with StationReplays(request.db_path) as replays:
        return replays.replay(request)


class StationReplays:
    """Replays sessions of one station file, one after another: the file is opened (and, for
    a replay to store, its lock taken) once for them all, not once per session (opening the
    file for writing checks it whole, SQLite's quick check). Each replay is still stored, or
    not, in its own transaction. A context manager: the file is closed and the lock released
    on the way out."""

    def __init__(self, db_path: Path) -> None:
        self.db_path = db_path
        self._original: Store | None = None
        self._station: Store | None = None
        self._lock: Any = None

    def __enter__(self) -> StationReplays:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Close the file and release the station's lock, if taken."""
        for store in (self._original, self._station):
            if store is not None:
                store.close()
        self._original = self._station = None
        if self._lock is not None:
            self._lock.release()
            self._lock = None

    def original(self) -> Store:
        """Return the station file opened read-only, to read recordings from."""
        if self._original is None:
            self._original = Store.open(self.db_path, read_only=True)
        return self._original

    def station(self) -> Store:
        """Return the station file opened for writing, its lock held; NotReplayable while a
        daemon holds the file."""
        from chargebook.acquire.record.station_lock import StationInUse, StationLock

        if self._station is None:
            lock = StationLock(self.db_path)
            try:
                lock.acquire()
            except StationInUse as busy:
                raise NotReplayable(
                    f"the replay cannot be stored: {busy}; --dry-run replays without writing "
                    "anything"
                ) from None
            try:
                self._station = Store.open(self.db_path)
            except BaseException:
                lock.release()
                raise
            self._lock = lock
            self._station.results_on_close = stored_row  # as the daemon keeps it
        return self._station

    def replay(self, request: ReplayRequest) -> ReplayReport:
        """Replay one stored session of the file as asked; return the report (raises as
        :func:`replay_session` does)."""
        original = self.original()
        setup, changes = _setup(original, request)
        detail = _replay_detail(setup.recording, request)
        if request.dry_run:
            with Store.memory() as scratch:
                run = run_pipeline(setup, request.speed, detail, scratch, None)
                comparison = _compare(original, setup, run, changes)
            replay_id, not_stored = None, None
        else:
            station = self.station()
            run, comparison, not_stored = _into_station(
                original, station, setup, changes, request, detail
            )
            replay_id = run.session_id if not_stored is None and run.stopped is None else None
        return _report(setup, request, changes, run, comparison, replay_id, not_stored)


def _report(
    setup: Setup,
    request: ReplayRequest,
    changes: list[Change],
    run: PipelineRun,
    comparison: Comparison,
    replay_id: int | None,
    not_stored: str | None,
) -> ReplayReport:
    """Return the report of a replay that ran."""
    return ReplayReport(
        original_id=setup.recording.session_id,
        replay_id=replay_id,
        profile=setup.profile.name,
        speed=request.speed,
        traffic_lines=len(setup.lines),
        comparison=comparison,
        what_if=bool(changes),
        stopped=run.stopped,
        traffic_notes=run.notes,
        not_stored=not_stored,
    )


def _setup(original: Store, request: ReplayRequest) -> tuple[Setup, list[Change]]:
    """Return what the pipeline runs (recording, profile, lines, plan, thresholds) and the
    what-if changes, after every check that can refuse the request."""
    from chargebook.acquire.session import rules
    from chargebook.drivers_generic import load_profile

    recording = load_recording(original, request.session_id)
    profile = load_profile(_profile_name(recording, request))
    lines = recording.lines
    if request.traffic_log is not None:
        where = traffic_positions(original, recording)
        lines = read_traffic_log(request.traffic_log, recording, profile, where)
    if lines and lines[0].direction != "tx":
        raise NotReplayable(
            f"session {recording.session_id} cannot be replayed: its traffic begins with a "
            "line the instrument sent unasked, before the replay could be listening"
        )
    plan = rules.resolve_plan(request.plan or recording.session.plan())
    thresholds = rules.thresholds_from_dict({**asdict(recording.thresholds), **request.thresholds})
    changes = plan_changes(recording.session.plan(), plan.to_dict())
    changes += threshold_changes(recording.thresholds, thresholds)
    setup = Setup(
        recording=recording,
        lines=lines,
        profile=profile,
        plan=plan,
        thresholds=thresholds,
        time_scale=_time_scale(recording, request),
        strict=not any(c.what.startswith("plan") for c in changes),
    )
    return setup, changes


class _NotStored(Exception):
    """Rolls back a replay that ran but is not to be stored; carries what it found."""

    def __init__(self, run: PipelineRun, comparison: Comparison, why: str | None) -> None:
        super().__init__(why)
        self.run, self.comparison, self.why = run, comparison, why


def _into_station(
    original: Store,
    station: Store,
    setup: Setup,
    changes: list[Change],
    request: ReplayRequest,
    detail: Replay,
) -> tuple[PipelineRun, Comparison, str | None]:
    """Replay into the station file (``station``, its lock held), in one transaction: the
    engine writes the session through the store's API, and the transaction is committed only
    for a replay that ran to the end and is to be kept (not a traffic log that does not
    reproduce the session, unless kept). Return the run, its comparison with the original and
    why it was not stored (None: stored, or stopped early)."""
    try:
        with station.atomic():
            replay_of = setup.recording.session_id
            run = run_pipeline(setup, request.speed, detail, station, replay_of)
            comparison = _compare(original, setup, run, changes)
            why = _why_not_stored(comparison, changes, request)
            if run.stopped is not None or why is not None:
                raise _NotStored(run, comparison, why)
            if _not_reproduced(comparison, changes, request):
                _mark_not_reproduced(station, run.session_id, request)
    except _NotStored as rolled_back:
        return rolled_back.run, rolled_back.comparison, rolled_back.why
    return run, comparison, None


def _compare(original: Store, setup: Setup, run: PipelineRun, changes: list[Change]) -> Comparison:
    """Return the comparison of the replayed session with the original."""
    explanations = Explanations(changes=changes, traffic_notes=run.notes, stopped=run.stopped)
    comparison = compare_sessions(
        original, setup.recording.session_id, run.store, run.session_id, explanations
    )
    if setup.lines is not setup.recording.lines:  # a traffic log: it must be the stored traffic
        comparison.differences += traffic_differences(setup.recording.lines, setup.lines)
    return comparison


def _why_not_stored(
    comparison: Comparison, changes: list[Change], request: ReplayRequest
) -> str | None:
    """Return why a replay of a traffic log is not stored (None: it is): a log that is not the
    stored traffic (a what-if's too), or an unchanged replay's log that does not reproduce."""
    if not _not_reproduced(comparison, changes, request) or request.keep:
        return None
    what = "does not reproduce the session"
    if _log_differs(comparison):
        what = "is not the traffic stored with the session"
    return (
        f"the traffic log {request.traffic_log} {what}; pass --keep to store the replay all "
        "the same, marked as not reproduced"
    )


def _not_reproduced(comparison: Comparison, changes: list[Change], request: ReplayRequest) -> bool:
    """Return True for a replay of a traffic log that is not the stored traffic, or (unchanged)
    that does not reproduce the session."""
    if request.traffic_log is None:
        return False
    return _log_differs(comparison) or (not changes and not comparison.exact)


def _log_differs(comparison: Comparison) -> bool:
    """Return True when a line of the traffic log played differs from the stored traffic."""
    return any(d.why == TRAFFIC_LOG_DIFFERS for d in comparison.differences)


def _mark_not_reproduced(station: Store, replay_id: int, request: ReplayRequest) -> None:
    """Record that a replay of a traffic log was kept although it does not reproduce."""
    from chargebook.acquire.replay.pipeline import REPLAY_ACTOR

    kept = ReplayNotReproduced(
        traffic_log=str(request.traffic_log),
        why="stored with --keep although this traffic log does not reproduce the session "
        "it replays",
    )
    station.add_event(replay_id, REPLAY_ACTOR, EventKind.REPLAY_NOT_REPRODUCED, kept)


def save_traffic_log(db_path: Path, session_id: int, path: Path, profile: str | None) -> int:
    """Write session ``session_id``'s recorded traffic to ``path`` as a JSON-lines traffic log
    (what ``--traffic-log`` reads back); return how many lines were written."""
    from chargebook.drivers_generic import load_profile

    with Store.open(db_path, read_only=True) as store:
        recording = load_recording(store, session_id)
    request = ReplayRequest(db_path, session_id, profile=profile)
    write_playback_log(load_profile(_profile_name(recording, request)), recording.lines, path)
    return len(recording.lines)


def _profile_name(recording: Recording, request: ReplayRequest) -> str:
    return str(_given_or_recorded(recording, request.profile, recording.profile, "profile"))


def _time_scale(recording: Recording, request: ReplayRequest) -> float:
    return float(_given_or_recorded(recording, request.time_scale, recording.time_scale, "time"))


#: What a session may not say about how it was recorded: words, and the option to pass.
_UNRECORDED = {
    "profile": ("which instrument profile read it", "--profile NAME"),
    "time": ("at which time scale the daemon ran", "--time-scale X"),
}


def _given_or_recorded(recording: Recording, given: Any, recorded: Any, what: str) -> Any:
    """Return the value given as an option, else the recorded one; NotReplayable if neither."""
    value = given if given is not None else recorded
    if value is None:
        words, option = _UNRECORDED[what]
        raise NotReplayable(f"session {recording.session_id} does not say {words}; pass {option}")
    return value


def _replay_detail(recording: Recording, request: ReplayRequest) -> Replay:
    """Return the detail of the event a replayed session starts with."""
    return Replay(
        replay_of=recording.session_id,
        speed=request.speed,
        traffic_log=str(request.traffic_log) if request.traffic_log else None,
        plan=request.plan,
        thresholds=request.thresholds or None,
    )
