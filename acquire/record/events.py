"""The record's vocabulary of events: every kind of audit event, and the shape of its detail.

An event is who (``actor``) did what (``kind``), when, and why (``detail``, a JSON object). Each
kind is a member of :class:`EventKind`, whose values are exactly the strings stored in the
``events.kind`` column, so station files written before this module read the same. Each kind
declares its detail as a ``TypedDict`` (or, for ``thresholds``, the frozen dataclass whose fields
it stores) in :func:`detail_types`. Writers build the detail as that type, so the type checker
sees its keys; :meth:`Store.add_event` calls :func:`check_detail`, which refuses, naming the kind
and the key, a detail with a key missing or a key the kind does not declare.

This module is the record's (``acquire/record``): the store checks every event it appends, and
every room above the record (session, engine, reports, replay, daemon) reads and writes with it.
A new kind: DEVELOPERS.md, "A new event kind".
"""

from __future__ import annotations

import dataclasses
import enum
import functools
from collections.abc import Mapping
from typing import Any, NotRequired, TypedDict, is_typeddict

from chargebook.corrections.errors import InputError


class EventKind(enum.StrEnum):
    """Every kind of event the record holds; the value is the string stored."""

    # written by the store itself, with the row they describe
    SESSION_CREATED = "session_created"
    SESSION_STATUS = "session_status"
    SET_STATUS = "set_status"
    STATION_NAMED = "station_named"
    # written by the engine at session start
    THRESHOLDS = "thresholds"
    ACQUISITION = "acquisition"
    CARRIED_FACTORS = "carried_factors"
    LEAKAGE_SUBTRACTION_CHOSEN = "leakage_subtraction_chosen"
    # written by the engine as the session goes
    STATE_CHANGED = "state_changed"
    STEP_ENTERED = "step_entered"
    STEP_SKIPPED = "step_skipped"
    ENVIRONMENT_ENTERED = "environment_entered"
    MANUAL_STEP_DONE = "manual_step_done"
    BIAS_CHANGED = "bias_changed"
    READING_RECORDED = "reading_recorded"
    READING_DROPPED = "reading_dropped"
    SESSION_RESUMED = "session_resumed"
    STATE_RESTORED = "state_restored"
    # the instrument, as the engine hears of it
    INSTRUMENT_IDENTIFIED = "instrument_identified"
    INSTRUMENT_LOST = "instrument_lost"
    INSTRUMENT_FAULT = "instrument_fault"
    INSTRUMENT_BACK = "instrument_back"
    # the daemon's own life
    DAEMON_STARTED = "daemon_started"
    DAEMON_RESTARTED = "daemon_restarted"
    DAEMON_STOPPED = "daemon_stopped"
    DAEMON_ERROR = "daemon_error"
    UNRECORDED_LINES_RECOVERED = "unrecorded_lines_recovered"
    # after the session
    SESSION_REVIEWED = "session_reviewed"
    REPLAY = "replay"
    REPLAY_NOT_REPRODUCED = "replay_not_reproduced"
    #: A remark in words for the audit log (the reports show it; the daemon writes none).
    NOTE = "note"
    # the station's registers (outside any session)
    REGISTER_ROW = "register_row"
    # the operator's MU per reading and deliveries (in a session)
    MU_PER_READING_SET = "mu_per_reading_set"
    DELIVERY_SHORT = "delivery_short"
    # calibration visits (outside any session, but VISIT_BEAM in the beam's session)
    VISIT_CREATED = "visit_created"
    VISIT_STATUS = "visit_status"
    VISIT_BEAM_ADDED = "visit_beam_added"
    VISIT_BEAM_STARTED = "visit_beam_started"
    VISIT_BEAM_STATUS = "visit_beam_status"
    VISIT_BEAM = "visit_beam"
    VISIT_REVIEWED = "visit_reviewed"
    # the bench (the simulated linac and bias switch), as the engine hears of it
    BENCH_REFUSED = "bench_refused"


# ----------------------------------------------------------------- written by the store
class SessionCreated(TypedDict):
    convention: str
    beam: str
    replay_of: int | None
    uuid: str


SessionStatus = TypedDict(
    "SessionStatus", {"from": str, "to": str, "reason": str | None, "closed_at": str | None}
)
SetStatus = TypedDict(
    "SetStatus",
    {
        "set_id": int,
        "step_key": str,
        "attempt": int,
        "from": str,
        "to": str,
        "reason": str | None,
        "ended_at": str | None,
    },
)
StationNamed = TypedDict("StationNamed", {"from": str, "to": str})


# ------------------------------------------------------------ written by the engine
class Acquisition(TypedDict):
    """How the traffic of the session is to be read again: profile and time scale."""

    profile: str
    time_scale: float


class CarriedFactors(TypedDict):
    """The carried k_pol and k_s copied into the session's metadata, each as entered there."""

    k_pol: NotRequired[dict[str, Any]]
    k_s: NotRequired[dict[str, Any]]


class LeakageSubtractionChosen(TypedDict):
    subtract_leakage: bool


StateChanged = TypedDict(
    "StateChanged",
    {
        "from": str,  # EngineState values
        "to": str,
        "action": str,  # the operator action (a Method value) or what the daemon saw
        "set_id": NotRequired[int],
        "wait_s": NotRequired[float],  # a settling wait begun, s (engine clock)
        "reason": NotRequired[str],
        "next_step": NotRequired[int],
    },
)


class StepEntered(TypedDict):
    step_index: int
    step_key: str


class StepSkipped(TypedDict):
    step_index: int
    step_key: str


class EnvironmentEntry(TypedDict):
    """An environment entry after its range checks: °C, kPa, the pressure as entered, % RH."""

    temperature_C: float
    pressure_kPa: float
    pressure_entered: float
    pressure_unit: str
    humidity_pct: float | None


class EnvironmentEntered(EnvironmentEntry):
    environment_id: int
    source: str


class ManualAction(TypedDict):
    """A step the operator must do by hand: today, turning the bias switch to ``volts``."""

    action: str  # "set_bias"
    volts: float


class ManualStepDone(ManualAction):
    by_hand: bool
    note: str | None


class BiasChanged(TypedDict):
    volts: float
    how: str  # "remote" (the driver set it) | "by hand" (the operator confirmed it)


class ReadingRecorded(TypedDict):
    """A reading captured: its row, charge (nC), how, and its times (s, driver's clock)."""

    reading_id: int
    set_id: int
    charge_nC: float
    capture: str  # a CAPTURE_MODES value
    settling: bool
    integration_s: float  # from arming to capture
    armed_t_s: float


class ReadingDropped(TypedDict):
    why: str
    charge_nC: float | None  # integrated so far, or None before any sample


class SessionResumed(TypedDict):
    step_index: int | None  # None: every step was done


class StateRestored(TypedDict):
    to: str
    set_id: int


class InstrumentIdentified(TypedDict):
    """Who the instrument says it is: "manufacturer, model, serial, firmware" as it answered."""

    identity: str
    profile: str


class InstrumentMessage(TypedDict):
    """``instrument_lost`` / ``instrument_fault``: the driver's words."""

    message: str


class BenchRefused(TypedDict):
    """``bench_refused``: the bench's words, and the reading whose beam it was asked for (its
    set and its number in the set; None when no reading was in progress)."""

    message: str
    set_id: int | None
    reading_number: int | None


class InstrumentBack(TypedDict):
    identity: str | None


# ----------------------------------------------------------------- written by the daemon
class DaemonStarted(TypedDict):
    pid: int


class DaemonRestarted(TypedDict):
    pid: int
    previous_run: str  # "stopped cleanly" | "crashed" | daemon.STOPPED_LINES_SET_ASIDE
    previous_stop: str | None
    previous_pid: int | None


class DaemonStopped(TypedDict):
    pid: int
    reason: str | None


DaemonError = TypedDict("DaemonError", {"while": str, "error": str})


class UnrecordedLinesRecovered(TypedDict):
    """Raw lines of this session recorded at a daemon start from the side file a daemon that
    stopped while the record could not commit wrote (``acquire/record/unrecorded.py``)."""

    file: str  # the side file's name, beside the database (renamed *.recovered)
    sha256: str  # of the side file as read
    lines: int  # of this session
    file_lines: int  # in the whole file
    first_recorded_at: str  # when the file's first line was read (UTC)
    last_recorded_at: str  # when its last line was read (UTC)
    stopped_by: str | None  # why the run that set them aside stopped (SIGTERM, SIGINT ...)
    cause: str | None  # why its record could not commit, in words
    note: str  # read before the last stop; no reading derived from them


# ----------------------------------------------------------------------- after a session
class SessionReviewed(TypedDict):
    status: str  # approved | rejected
    reviewer: str
    comment: str
    measured_by: str | None
    self_review_allowed: bool
    self_review: bool  # the reviewer measured or started it (allowed by self_review_allowed)


class Replay(TypedDict):
    """What a replay was asked to do: of which session, how fast, from which traffic, what if."""

    replay_of: int
    speed: float
    traffic_log: str | None
    plan: str | None  # a plan name or TOML path, or None: the recorded plan
    thresholds: dict[str, Any] | None  # threshold names and values changed, or None


class ReplayNotReproduced(TypedDict):
    traffic_log: str
    why: str


class Note(TypedDict):
    text: str


class RegisterRowAdded(TypedDict):
    """A register row added (``supersedes`` None) or superseding another; its fields as stored."""

    row: int
    kind: str
    entry: int
    supersedes: int | None
    effective_from: str
    fields: dict[str, Any]
    reason: str | None


class MuPerReadingSet(TypedDict):
    """The MU per reading the operator chose for the compared steps, and the plan's (MU)."""

    plan_MU: float | None  # None: the plan had no MU per reading for its compared steps
    mu_per_reading: float | None


class DeliveryShort(TypedDict):
    """A reading's delivery stopped short: the MU planned and delivered, and why."""

    reading_id: int
    set_id: int
    planned_MU: float
    actual_MU: float
    reason: str


class VisitCreated(TypedDict):
    visit_id: int
    uuid: str
    machine: str
    metadata: dict[str, Any]


VisitStatus = TypedDict(
    "VisitStatus",
    {"visit_id": int, "from": str, "to": str, "reason": str | None, "closed_at": str | None},
)


class VisitBeamAdded(TypedDict):
    visit_id: int
    beam_id: int
    position: int
    name: str
    plan: str


class VisitBeamStarted(TypedDict):
    """A session begun on a beam of a visit (outside sessions)."""

    visit_id: int
    beam_id: int
    beam: str
    session_id: int


class VisitBeam(VisitBeamStarted):
    """The same link, in the beam's session's own chain, with the visit's uuid and the place."""

    visit_uuid: str
    position: int


class VisitBeamStatus(TypedDict):
    """A beam skipped or left unfinished by hand, with the reason."""

    visit_id: int
    beam_id: int
    beam: str
    to: str  # a visits.BEAM_MARKS value
    reason: str


class VisitReviewed(SessionReviewed):
    visit_id: int


@functools.cache
def detail_types() -> dict[EventKind, type]:
    """Return the declared shape of each kind's detail (by kind): a TypedDict,
    or a dataclass whose fields it holds. Made on first use: ``thresholds`` declares its
    detail as corrections' :class:`Thresholds`, whose module imports numpy, which a command
    that only reads the record then never imports."""
    from chargebook.corrections.stability import Thresholds

    return {
        EventKind.SESSION_CREATED: SessionCreated,
        EventKind.SESSION_STATUS: SessionStatus,
        EventKind.SET_STATUS: SetStatus,
        EventKind.STATION_NAMED: StationNamed,
        EventKind.THRESHOLDS: Thresholds,
        EventKind.ACQUISITION: Acquisition,
        EventKind.CARRIED_FACTORS: CarriedFactors,
        EventKind.LEAKAGE_SUBTRACTION_CHOSEN: LeakageSubtractionChosen,
        EventKind.STATE_CHANGED: StateChanged,
        EventKind.STEP_ENTERED: StepEntered,
        EventKind.STEP_SKIPPED: StepSkipped,
        EventKind.ENVIRONMENT_ENTERED: EnvironmentEntered,
        EventKind.MANUAL_STEP_DONE: ManualStepDone,
        EventKind.BIAS_CHANGED: BiasChanged,
        EventKind.READING_RECORDED: ReadingRecorded,
        EventKind.READING_DROPPED: ReadingDropped,
        EventKind.SESSION_RESUMED: SessionResumed,
        EventKind.STATE_RESTORED: StateRestored,
        EventKind.INSTRUMENT_IDENTIFIED: InstrumentIdentified,
        EventKind.INSTRUMENT_LOST: InstrumentMessage,
        EventKind.INSTRUMENT_FAULT: InstrumentMessage,
        EventKind.INSTRUMENT_BACK: InstrumentBack,
        EventKind.DAEMON_STARTED: DaemonStarted,
        EventKind.DAEMON_RESTARTED: DaemonRestarted,
        EventKind.DAEMON_STOPPED: DaemonStopped,
        EventKind.DAEMON_ERROR: DaemonError,
        EventKind.UNRECORDED_LINES_RECOVERED: UnrecordedLinesRecovered,
        EventKind.SESSION_REVIEWED: SessionReviewed,
        EventKind.REPLAY: Replay,
        EventKind.REPLAY_NOT_REPRODUCED: ReplayNotReproduced,
        EventKind.NOTE: Note,
        EventKind.REGISTER_ROW: RegisterRowAdded,
        EventKind.MU_PER_READING_SET: MuPerReadingSet,
        EventKind.DELIVERY_SHORT: DeliveryShort,
        EventKind.VISIT_CREATED: VisitCreated,
        EventKind.VISIT_STATUS: VisitStatus,
        EventKind.VISIT_BEAM_ADDED: VisitBeamAdded,
        EventKind.VISIT_BEAM_STARTED: VisitBeamStarted,
        EventKind.VISIT_BEAM: VisitBeam,
        EventKind.VISIT_BEAM_STATUS: VisitBeamStatus,
        EventKind.VISIT_REVIEWED: VisitReviewed,
        EventKind.BENCH_REFUSED: BenchRefused,
    }


_KINDS = frozenset(kind.value for kind in EventKind)


def detail_keys(kind: EventKind) -> tuple[frozenset[str], frozenset[str]]:
    """Return (required keys, optional keys) of the detail ``kind`` declares."""
    declared = detail_types()[kind]
    if is_typeddict(declared):
        required: frozenset[str] = getattr(declared, "__required_keys__")  # noqa: B009
        optional: frozenset[str] = getattr(declared, "__optional_keys__")  # noqa: B009
        return frozenset(required), frozenset(optional)
    names = frozenset(field.name for field in dataclasses.fields(declared))
    return names, frozenset()


def event_kind(kind: object) -> EventKind:
    """Return ``kind`` as an :class:`EventKind`; InputError naming it when it is none."""
    if isinstance(kind, str) and kind in _KINDS:
        return EventKind(kind)
    raise InputError("event kind", kind, "one of " + ", ".join(EventKind), "is not a kind of event")


def check_detail(kind: object, detail: Mapping[str, object]) -> EventKind:
    """Return the event's kind once its ``detail`` has exactly the keys the kind declares.

    Raises InputError naming the kind and the first key missing (a required key) or extra (a
    key the kind does not declare), or the kind when it is not an :class:`EventKind`.
    """
    checked = event_kind(kind)
    required, optional = detail_keys(checked)
    if not isinstance(detail, Mapping):
        raise InputError(
            f"{checked.value} detail", detail, _keys_allowed(required, optional), "is not a dict"
        )
    missing = sorted(required - detail.keys())
    if missing:
        raise InputError(
            f"{checked.value} detail.{missing[0]}",
            None,
            _keys_allowed(required, optional),
            "is missing",
        )
    extra = sorted(detail.keys() - required - optional)
    if extra:
        raise InputError(
            f"{checked.value} detail.{extra[0]}",
            detail[extra[0]],
            _keys_allowed(required, optional),
            f"is not a key of a {checked.value} event",
        )
    return checked


def _keys_allowed(required: frozenset[str], optional: frozenset[str]) -> str:
    words = "keys " + ", ".join(sorted(required))
    if optional:
        words += "; optional " + ", ".join(sorted(optional))
    return words


__all__ = ["EventKind", "check_detail", "detail_keys", "detail_types", "event_kind"]
