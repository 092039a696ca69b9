"""Replaying a recorded session through the whole pipeline, to reproduce it or to ask "what if".

``chargebook replay SESSION`` plays the session's recorded raw traffic through the simulated
electrometer in playback mode (``chargebook simulate --playback``: a process of its own, on a
real pseudo-terminal), reads it with the real driver of the session's profile, interprets it
with the real engine, stores it with the real store, and compares the new session with the
original, reading by reading and result by result (``replay_compare``).

What makes it exact: the engine decides from the samples it is given and from the times it is
given (see ``chargebook.acquire.engine.engine``). The driver stamps every line with the time it was
recorded with, the engine's clock reads the time each reading was armed in the original, and
the recorded operator's actions are applied at the same points of the traffic
(``replay_conductor``). The readings are parsed again from the same bytes, so an unchanged
replay gives bit-identical numbers. The only part of the daemon a replay leaves out is its
timing: when to poll and when the operator acted come from the recording.

What if: another plan (``plan``) or other thresholds (``thresholds``) run the same recording
through an engine set up differently; the comparison then says what differs and why. A
threshold only changes flags; a plan may ask for what the recording does not hold (a reading
more than was taken), and then the replay stops there and says so.

Nothing is written to the station database unless the replay ran to the end: it runs against a
scratch store in memory and is then copied in one transaction (``replay_copy``), as a new
session with ``replay_of`` set to the original's id. A corrupted or truncated traffic log is
refused before anything runs.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from chargebook.acquire.record.events import EventKind, Replay, ReplayNotReproduced
from chargebook.acquire.record.store import Store
from chargebook.acquire.replay.compare import (
    Change,
    Comparison,
    Explanations,
    compare_sessions,
    plan_changes,
    threshold_changes,
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

__all__ = [
    "Divergence",
    "NotReplayable",
    "ReplayReport",
    "ReplayRequest",
    "TrafficLogError",
    "replay_session",
    "save_traffic_log",
]


#: Why a session recorded before readings were captured on samples may not replay exactly.
OLDER_RECORDING = (
    "the session was recorded by an older chargebook, which captured readings on clock ticks "
    "and kept no arming times: its capture decisions cannot be made again from its traffic"
)


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
    truncated log) and InputError for what cannot be replayed as asked, Divergence when an
    unchanged replay does not follow its recording. None of these writes anything.
    """
    original = Store.open(request.db_path, read_only=True)
    try:
        setup, changes = _setup(original, request)
        try:
            run = run_pipeline(setup, request.speed, _replay_detail(setup.recording, request))
        except Divergence as divergence:
            if setup.recording.armed_times_recorded:
                raise
            raise Divergence(f"{divergence} ({OLDER_RECORDING})") from None
        try:
            replay_id, comparison, not_stored = _finish(original, setup, run, changes, request)
        finally:
            run.store.close()
    finally:
        original.close()
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


def _finish(
    original: Store, setup: Setup, run: PipelineRun, changes: list[Change], request: ReplayRequest
) -> tuple[int | None, Comparison, str | None]:
    """Store a replay that ran to the end (unless a dry run, or an unchanged replay of a traffic
    log that does not reproduce the session, unless kept); compare it with the original.
    Return the stored session's id, the comparison, and why it was not stored if it was not."""
    from chargebook.acquire.replay.kept_copy import copy_session
    from chargebook.acquire.replay.pipeline import REPLAY_ACTOR

    recording = setup.recording
    explanations = Explanations(
        changes=changes,
        traffic_notes=run.notes,
        stopped=run.stopped,
        arming_times_recorded=recording.armed_times_recorded,
    )
    if run.stopped is not None or request.dry_run:
        comparison = compare_sessions(
            original, recording.session_id, run.store, run.session_id, explanations
        )
        return None, comparison, None
    from_log = request.traffic_log is not None and not changes
    if from_log:
        comparison = compare_sessions(
            original, recording.session_id, run.store, run.session_id, explanations
        )
        if not comparison.exact and not request.keep:
            why = (
                f"the traffic log {request.traffic_log} does not reproduce the session; pass "
                "--keep to store the replay all the same, marked as not reproduced"
            )
            return None, comparison, why
    with Store.open(request.db_path) as station:
        replay_id = copy_session(run.store, run.session_id, station, recording.session_id)
        comparison = compare_sessions(
            original, recording.session_id, station, replay_id, explanations
        )
        if from_log and not comparison.exact:
            kept = ReplayNotReproduced(
                traffic_log=str(request.traffic_log),
                why="stored with --keep although this traffic log does not reproduce "
                "the session it replays",
            )
            station.add_event(replay_id, REPLAY_ACTOR, EventKind.REPLAY_NOT_REPRODUCED, kept)
    return replay_id, comparison, None


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
