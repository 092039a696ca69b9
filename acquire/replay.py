"""Replaying a recorded session through the whole pipeline, to reproduce it or to ask "what if".

``chargebook replay SESSION`` plays the session's recorded raw traffic through the simulated
electrometer in playback mode (``chargebook simulate --playback``: a process of its own, on a
real pseudo-terminal), reads it with the real driver of the session's profile, interprets it
with the real engine, stores it with the real store, and compares the new session with the
original, reading by reading and result by result (``replay_compare``).

What makes it exact: the engine decides from the samples it is given and from the times it is
given (see ``chargebook.acquire.engine``). The driver stamps every line with the time it was
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

import logging
import tempfile
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from chargebook.acquire.engine import Engine
from chargebook.acquire.replay_compare import (
    Comparison,
    Explanations,
    compare_sessions,
    plan_changes,
    threshold_changes,
)
from chargebook.acquire.replay_conductor import ArmingClock, Conductor, Pacer, WhatIfStop
from chargebook.acquire.replay_recording import (
    NotReplayable,
    RecordedLine,
    Recording,
    load_recording,
    traffic_positions,
)
from chargebook.acquire.replay_traffic import (
    Divergence,
    TrafficFollower,
    TrafficLogError,
    read_traffic_log,
    write_playback_log,
)
from chargebook.acquire.store import Store
from chargebook.corrections.stability import Thresholds

log = logging.getLogger(__name__)

__all__ = [
    "Divergence",
    "NotReplayable",
    "ReplayReport",
    "ReplayRequest",
    "TrafficLogError",
    "replay_session",
    "save_traffic_log",
]

#: Who the replay names as the actor of the events it writes itself.
REPLAY_ACTOR = "replay"
#: The event a replayed session starts with: what was replayed, and how.
REPLAY_EVENT = "replay"
#: Inputs a replay cannot apply, and why (none at present: every recorded input is applied).
UNSUPPORTED_INPUTS: dict[str, str] = {}


@dataclass(frozen=True)
class ReplayRequest:
    """What to replay, and how. ``speed`` 0 runs as fast as the pipeline allows.

    ``plan`` (a plan name or TOML path) and ``thresholds`` (threshold names and values laid
    over the session's own) make it a what-if replay;
    ``traffic_log`` plays a JSON-lines log in place of the stored traffic; ``profile`` and
    ``time_scale`` override what the session recorded; ``dry_run`` writes nothing.
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
            **self.comparison.to_dict(),
        }


@dataclass
class _Run:
    """A replay run against a scratch store (see :func:`_run_pipeline`)."""

    store: Store
    session_id: int
    stopped: str | None
    notes: list[str]


def replay_session(request: ReplayRequest) -> ReplayReport:
    """Replay one stored session as asked; return the report.

    Raises NotFound for an unknown session, NotReplayable (TrafficLogError for a corrupted or
    truncated log) and InputError for what cannot be replayed as asked, Divergence when an
    unchanged replay does not follow its recording. None of these writes anything.
    """
    from chargebook.acquire import live
    from chargebook.drivers_generic import load_profile

    original = Store.open(request.db_path, read_only=True)
    try:
        recording = load_recording(original, request.session_id)
        _check_inputs(recording)
        profile = load_profile(_profile_name(recording, request))
        lines = recording.lines
        if request.traffic_log is not None:
            where = traffic_positions(original, recording)
            lines = read_traffic_log(request.traffic_log, recording, profile, where)
        _check_start(recording, lines)
        plan = live.resolve_plan(request.plan or recording.session.plan())
        thresholds = live.thresholds_from_dict(
            {**asdict(recording.thresholds), **request.thresholds}
        )
        changes = plan_changes(recording.session.plan(), plan.to_dict())
        changes += threshold_changes(recording.thresholds, thresholds)
        what_if = bool(changes)
        run = _run_pipeline(
            recording,
            lines,
            profile,
            plan,
            thresholds,
            request,
            strict=not any(c.what.startswith("plan") for c in changes),
        )
        explanations = Explanations(
            changes=changes,
            traffic_notes=run.notes,
            stopped=run.stopped,
            arming_times_recorded=recording.armed_times_recorded,
        )
        replay_id = None
        if run.stopped is None and not request.dry_run:
            replay_id = _store_replay(run, request.db_path, recording.session_id)
            with Store.open(request.db_path, read_only=True) as station:
                comparison = compare_sessions(
                    original, recording.session_id, station, replay_id, explanations
                )
        else:
            comparison = compare_sessions(
                original, recording.session_id, run.store, run.session_id, explanations
            )
        run.store.close()
    finally:
        original.close()
    return ReplayReport(
        original_id=recording.session_id,
        replay_id=replay_id,
        profile=profile.name,
        speed=request.speed,
        traffic_lines=len(lines),
        comparison=comparison,
        what_if=what_if,
        stopped=run.stopped,
        traffic_notes=run.notes,
    )


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
    name = request.profile or recording.profile
    if name is None:
        raise NotReplayable(
            f"session {recording.session_id} does not say which instrument profile read it; "
            "pass --profile NAME"
        )
    return name


def _time_scale(recording: Recording, request: ReplayRequest) -> float:
    time_scale = request.time_scale or recording.time_scale
    if time_scale is None:
        raise NotReplayable(
            f"session {recording.session_id} does not say at which time scale the daemon ran; "
            "pass --time-scale X"
        )
    return float(time_scale)


def _check_inputs(recording: Recording) -> None:
    for recorded in recording.inputs:
        why = UNSUPPORTED_INPUTS.get(recorded.kind)
        if why is not None:
            raise NotReplayable(
                f"session {recording.session_id} cannot be replayed: {why} (event "
                f"{recorded.event_id})"
            )


def _check_start(recording: Recording, lines: tuple[RecordedLine, ...]) -> None:
    if lines and lines[0].direction != "tx":
        raise NotReplayable(
            f"session {recording.session_id} cannot be replayed: its traffic begins with a "
            "line the instrument sent unasked, before the replay could be listening"
        )


def _run_pipeline(
    recording: Recording,
    lines: tuple[RecordedLine, ...],
    profile: Any,
    plan: Any,
    thresholds: Thresholds,
    request: ReplayRequest,
    *,
    strict: bool,
) -> _Run:
    """Run the recording through the playback simulator, the driver and the engine."""
    from chargebook.acquire.demo_run import start_child, stop_child
    from chargebook.drivers_generic import build_electrometer

    time_scale = _time_scale(recording, request)
    with tempfile.TemporaryDirectory(prefix="chargebook-replay-") as work:
        playback = write_playback_log(profile, lines, Path(work) / "playback.jsonl")
        simulator = start_child(
            "simulated electrometer (playback)",
            [
                "simulate", "--serial", "--profile", profile.name, "--playback", str(playback),
                "--speed", str(request.speed),
            ],
            Path(work) / "simulator.log",
        )  # fmt: skip
        try:
            follower = TrafficFollower(
                lines, profile, same_command=None if strict else _same_command(profile)
            )
            driver = build_electrometer(
                profile, port=simulator.info["serial"], traffic=follower, clock=follower.clock
            )
            store = Store.memory()
            clock = ArmingClock(recording.armed_times_s, after=lambda: follower.last_t_s)

            def new_engine() -> Engine:
                return Engine(
                    store,
                    capabilities=profile.capabilities,
                    clock=clock,
                    default_plan=plan,
                    profile=profile.name,
                    time_scale=time_scale,
                    thresholds=thresholds,
                )

            def restarted() -> Engine:
                """A daemon started again on the same file (as ``Daemon.run`` does it)."""
                engine = new_engine()
                engine.instrument_connected = False
                engine.instrument_message = "connecting to the electrometer"
                engine.restore()
                return engine

            engine = new_engine()
            session_id = engine.start_session(
                recording.session.metadata(), plan, actor=replayed(recording.start_actor)
            )
            clock.recorded = lambda: len(store.readings(session_id))
            follower.attach(store, session_id)
            store.add_event(
                session_id, REPLAY_ACTOR, REPLAY_EVENT, _replay_detail(recording, request)
            )
            conductor = Conductor(
                engine,
                driver,
                follower,
                recording.inputs,
                strict=strict,
                pacer=Pacer(request.speed),
                actor=replayed,
                original_lines=recording.lines,
                session_id=recording.session_id,
                restart=restarted,
            )
            stopped = None
            driver.open()
            try:
                conductor.run()
            except WhatIfStop as stop:
                stopped = str(stop)
            finally:
                driver.close()
        finally:
            stop_child(simulator.process)
    notes = [
        f"traffic line {n.index + 1}: the replay sent {n.sent!r} where the original sent "
        f"{n.recorded!r}"
        for n in follower.notes
    ]
    return _Run(store, session_id, stopped, notes)


def replayed(actor: str) -> str:
    """Return the actor a replayed action is recorded under."""
    return f"{actor} (replayed)"


def _replay_detail(recording: Recording, request: ReplayRequest) -> dict[str, Any]:
    return {
        "replay_of": recording.session_id,
        "speed": request.speed,
        "traffic_log": str(request.traffic_log) if request.traffic_log else None,
        "plan": request.plan,
        "thresholds": request.thresholds or None,
    }


def _same_command(profile: Any):
    """Return a test of whether two sent lines are the same command of ``profile``."""
    from chargebook.drivers_generic.simulator.dialect import template_pattern

    patterns = [
        (spec.name, template_pattern(template))
        for spec in profile.commands.values()
        for template in spec.templates
    ]

    def name_of(text: str) -> str | None:
        return next((name for name, pattern in patterns if pattern.fullmatch(text)), None)

    def same(recorded: str, sent: str) -> bool:
        name = name_of(recorded)
        return name is not None and name == name_of(sent)

    return same


def _store_replay(run: _Run, db_path: Path, original_id: int) -> int:
    from chargebook.acquire.replay_copy import copy_session

    with Store.open(db_path) as station:
        return copy_session(run.store, run.session_id, station, original_id)
