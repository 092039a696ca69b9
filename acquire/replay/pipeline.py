"""The replay's pipeline: the playback simulator, the real driver and the real engine.

:func:`run_pipeline` plays the recorded lines with the simulated electrometer's playback (the
same responder and pty server as ``chargebook simulate --playback``, on a real pseudo-terminal,
served by a thread of the replay's own process: no second process to start, and an answer
needs no hop between processes), opens the profile's driver on it with the
:class:`~chargebook.acquire.replay.traffic.TrafficFollower` as its clock and traffic listener,
starts the session again in a new engine on the store it is given (the station's, inside one
transaction, or a scratch store in memory for a dry run), and lets the
:class:`~chargebook.acquire.replay.conductor.Conductor` feed it the session's logged inputs.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.record.events import EventKind, Replay
from chargebook.acquire.record.store import Store
from chargebook.acquire.replay.conductor import Conductor, Pacer, WhatIfStop
from chargebook.acquire.replay.recording import RecordedLine, Recording
from chargebook.acquire.replay.traffic import TrafficFollower, command_namer, line_text
from chargebook.corrections.stability import Thresholds

#: Who the replay names as the actor of the events it writes itself.
REPLAY_ACTOR = "replay"


@dataclass(frozen=True)
class Setup:
    """What a replay runs: the recording, the lines to play, and how the engine is set up.

    ``strict``: an unchanged replay, which stops at the first line that does not fit.
    """

    recording: Recording
    lines: tuple[RecordedLine, ...]
    profile: Any
    plan: Any
    thresholds: Thresholds
    time_scale: float
    strict: bool


@dataclass
class PipelineRun:
    """The replayed session in the store it was written to, and why it stopped early if it did."""

    store: Store
    session_id: int
    stopped: str | None
    notes: list[str]


def replayed(actor: str) -> str:
    """Return the actor a replayed action is recorded under."""
    return f"{actor} (replayed)"


def run_pipeline(
    setup: Setup, speed: float, detail: Replay, store: Store, replay_of: int | None
) -> PipelineRun:
    """Run the recording through the playback simulator, the driver and the engine, which
    writes the replayed session to ``store`` through the store's API (as a replay of session
    ``replay_of`` when given).

    ``speed`` paces it (0: as fast as possible); ``detail`` is written with the session's
    ``replay`` event. Raises Divergence (strict) or TrafficLogError where the recording does
    not fit; a what-if that cannot go on comes back with ``stopped`` set.
    """
    from chargebook.drivers_generic.driver import ProfileElectrometer
    from chargebook.drivers_generic.simulator.playback import playback_port

    profile = setup.profile
    texts: dict[tuple[str, bytes], str] = {}  # a recording says a few lines again and again
    entries = []
    for line in setup.lines:
        text = texts.get((line.direction, line.raw))
        if text is None:
            text = texts[line.direction, line.raw] = line_text(profile, line)
        entries.append((line.t_s, line.direction, text))
    with playback_port(entries, profile.framing, profile.mode, speed) as port:
        same = None if setup.strict else same_command(profile)
        follower = TrafficFollower(setup.lines, profile, same_command=same)
        transport = port.transport(profile, follower, follower.clock)
        driver = ProfileElectrometer(profile, transport, clock=follower.clock)
        return _play(setup, speed, detail, follower, driver, store, replay_of)


def _play(
    setup: Setup,
    speed: float,
    detail: Replay,
    follower: TrafficFollower,
    driver: Any,
    store: Store,
    replay_of: int | None,
) -> PipelineRun:
    """Start the session again in a new engine and feed it the logged inputs, playing the
    recorded lines through the driver."""
    recording = setup.recording
    new_engine = _engine_factory(setup, store, lambda: follower.last_t_s)
    engine = new_engine()
    start = dataclasses.replace(
        recording.start,
        metadata=recording.session.metadata(),  # as validated, with its carried factors
        plan=setup.plan,
        replay_of=replay_of,
        actor=replayed(recording.start.actor),
    )
    session_id = engine.apply(start)
    follower.attach(store, session_id)
    store.add_event(session_id, REPLAY_ACTOR, EventKind.REPLAY, detail)
    conductor = Conductor(
        engine,
        driver,
        follower,
        recording,
        strict=setup.strict,
        pacer=Pacer(speed),
        actor=replayed,
        restart=lambda: _restarted(new_engine()),
        edited=setup.lines != recording.lines,
        name_of=None if setup.strict else command_namer(setup.profile),
    )
    stopped = None
    driver.open()
    try:
        conductor.run()
    except WhatIfStop as stop:
        stopped = _plan_words(conductor.engine) or str(stop)
    finally:
        driver.close()
        follower.detach()  # what a what-if played before it stopped, and a last partial line
    notes = [
        f"traffic line {n.index + 1}: the replay sent {n.sent!r} where the original sent "
        f"{n.recorded!r}"
        for n in follower.notes
    ]
    return PipelineRun(store, session_id, stopped, [*notes, *conductor.notes])


def _plan_words(engine: Any) -> str | None:
    """Return why a what-if stopped, in words about the plan, when the recording ran out while
    the new plan still asked for readings ("the new plan asks for 6 routine readings; ...")."""
    step, active = engine.step, engine.active
    if step is None or active is None or not engine.wants_samples():
        return None
    purpose = str(step.purpose).replace("_", " ")
    return (
        f"the new plan asks for {int(step.readings)} {purpose} readings at step "
        f"{engine.step_index + 1} ({step.key}); the recording holds {active.used_count}"
    )


def _engine_factory(setup: Setup, store: Store, clock: Callable[[], float]) -> Callable[[], Engine]:
    """Return a maker of engines set up as the session's daemon set up its own."""

    def new_engine() -> Engine:
        return Engine(
            store,
            capabilities=setup.profile.capabilities,
            clock=clock,
            default_plan=setup.plan,
            profile=setup.profile.name,
            time_scale=setup.time_scale,
            thresholds=setup.thresholds,
        )

    return new_engine


def _restarted(engine: Engine) -> Engine:
    """Return ``engine`` as a daemon started again on the same file has it (``Daemon.run``):
    not yet connected to the instrument; the logged restart then resumes the session."""
    engine.instrument_connected = False
    engine.instrument_message = "connecting to the electrometer"
    return engine


def same_command(profile: Any) -> Callable[[str, str], bool]:
    """Return a test of whether two sent lines are the same command of ``profile`` (a what-if
    plan may send a command with other values, such as another bias)."""
    name_of = command_namer(profile)

    def same(recorded: str, sent: str) -> bool:
        name = name_of(recorded)
        return name is not None and name == name_of(sent)

    return same
