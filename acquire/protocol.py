"""The daemon's control protocol: JSON-RPC 2.0 over a Unix socket, one message per line.

This module is the contract between the daemon (``chargebook serve``) and its clients (the
console, ``chargebook run``/``demo``, scripts). It is pure: standard library only, no store, no
driver, no asyncio, so any client may import it.

Framing
    Newline-delimited UTF-8 JSON, one JSON-RPC 2.0 object per line, at most
    :data:`MAX_MESSAGE_BYTES` bytes per request line including the newline (the daemon's own
    messages may be up to :data:`MAX_DAEMON_MESSAGE_BYTES`). A longer request gets an
    ``invalid request`` error and that connection is closed; other clients are unaffected.
    Batches (JSON arrays) are not supported and get ``invalid request``.

Sequence of a client
    1. ``hello`` {client, operator?}: names the client and the person at the keyboard (the
       *actor* written in the audit log for every request on this connection).
    2. ``subscribe``: from now on the daemon sends notifications on this connection:
       ``delta`` (params: a :class:`Delta`, what changed since the snapshot of seq
       ``base_seq``, after every change) and ``event`` (params: one :class:`EventInfo`, the
       audit-log entry just committed). ``subscribe`` returns the whole current snapshot, the
       base of the first delta; :func:`apply_delta` turns a snapshot and a delta into the next
       snapshot. A client whose snapshot is not the delta's base (it missed one) asks for the
       whole snapshot again (``status``). So the bytes sent per reading do not grow with the
       session nor with the set: a reading sends itself, its set's new statistics and what
       else changed (the prompt), not its set's other readings nor the sets before it. While
       readings stream, the set's statistics and the results follow in a later delta (see
       the daemon).
    3. Operator actions (the methods in :data:`OPERATOR_ACTIONS`); the snapshot's ``allowed``
       lists the actions that are legal *now*; any other gets :data:`ILLEGAL_TRANSITION`.

Errors
    Standard codes (:data:`PARSE_ERROR` ... :data:`INTERNAL_ERROR`) and application codes
    (:data:`ILLEGAL_TRANSITION` — also when no session is open —, :data:`INPUT_ERROR`,
    :data:`INSTRUMENT_ERROR`, :data:`CONFIRMATION_REQUIRED`). Errors about one parameter carry
    ``data: {"field": ..., "value": ..., "allowed": ...}`` (:class:`ErrorData`) so a client can
    put the message next to the right input box. Every reading is committed to the store before
    any client hears of it.

Units: charge in nC, temperature in °C, pressure in kPa unless ``pressure_unit`` says hPa or
mmHg (converted once by the daemon, both values kept), bias in V (signed), time in s.
"""

from __future__ import annotations

import enum
import itertools
import json
import operator
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, Literal, NamedTuple, NotRequired, TypedDict, TypeVar

#: Shown with every result: by the console, the command line, reports and exports (defined in
#: the package root, where `chargebook --help` reads it without importing this module).
from chargebook import CAUTION as CAUTION

T = TypeVar("T")

PROTOCOL_VERSION = "1.0"
JSONRPC = "2.0"

#: Longest message a client may send the daemon, in bytes, newline included.
MAX_MESSAGE_BYTES = 64 * 1024
#: Longest message the daemon sends a client (a snapshot of a long session, a reply carrying
#: one), in bytes, newline included. Not bounded by the request limit: a session of 500 sets
#: must still reach its console.
MAX_DAEMON_MESSAGE_BYTES = 32 * 1024 * 1024

# ---------------------------------------------------------------------------------------------
# Error codes
# ---------------------------------------------------------------------------------------------
PARSE_ERROR = -32700  #: the line is not JSON
INVALID_REQUEST = -32600  #: JSON, but not a JSON-RPC 2.0 request (or the line is too long)
METHOD_NOT_FOUND = -32601  #: no such method
INVALID_PARAMS = -32602  #: a parameter is missing, unknown or of the wrong type (data names it)
INTERNAL_ERROR = -32603  #: a fault in the daemon; the request changed nothing

ILLEGAL_TRANSITION = -32001  #: the action is not legal in the current state (message says why)
INPUT_ERROR = -32002  #: a value is out of its allowed range (data: field, value, allowed)
INSTRUMENT_ERROR = -32003  #: the electrometer refused, timed out or is disconnected
CONFIRMATION_REQUIRED = -32005  #: a destructive action (abort) was sent without confirm=true

ERROR_NAMES: dict[int, str] = {
    PARSE_ERROR: "parse error",
    INVALID_REQUEST: "invalid request",
    METHOD_NOT_FOUND: "method not found",
    INVALID_PARAMS: "invalid params",
    INTERNAL_ERROR: "internal error",
    ILLEGAL_TRANSITION: "illegal transition",
    INPUT_ERROR: "input error",
    INSTRUMENT_ERROR: "instrument error",
    CONFIRMATION_REQUIRED: "confirmation required",
}


class ErrorData(TypedDict):
    """``error.data`` for an error about one parameter."""

    field: str
    value: Any
    allowed: str


# ---------------------------------------------------------------------------------------------
# States and actions
# ---------------------------------------------------------------------------------------------
class EngineState(enum.StrEnum):
    """Where the sequence is. The transitions are in ``chargebook.acquire.engine.states``."""

    IDLE = "idle"  #: no open session
    WAITING_FOR_OPERATOR = "waiting_for_operator"  #: a step is current; the operator must act
    SETTLING = "settling"  #: readings (or a wait) taken only to let the chamber settle
    COLLECTING = "collecting"  #: readings of the current set are being taken
    REVIEWING = "reviewing"  #: the set is complete; accept it or redo it
    PAUSED = "paused"  #: held by the operator; resume returns to the state it left
    INTERRUPTED = "interrupted"  #: the instrument was lost (or the daemon restarted) mid-set
    FINISHED = "finished"  #: the session is closed with results
    ABORTED = "aborted"  #: the session was abandoned; everything recorded is kept


class ReadingPhase(enum.StrEnum):
    """What the electrometer is doing within one reading."""

    IDLE = "idle"  #: not integrating
    ARMED = "armed"  #: integrating, waiting for the beam (charge not yet above the threshold)
    RISING = "rising"  #: the beam is on: charge rising
    HOLDING = "holding"  #: charge flat; end of beam is declared after the hold time
    TIMED = "timed"  #: integrating for a fixed time (leakage step, no beam)


class Method(enum.StrEnum):
    """Every method the daemon answers. Parameters are in :data:`METHODS`."""

    HELLO = "hello"
    SUBSCRIBE = "subscribe"
    UNSUBSCRIBE = "unsubscribe"
    STATUS = "status"
    SESSION_START = "session.start"
    ENVIRONMENT_SET = "environment.set"
    STEP_ARM = "step.arm"
    STEP_MANUAL_DONE = "step.manual_done"
    STEP_SKIP = "step.skip"
    READING_CAPTURE = "reading.capture"
    READING_SHORT = "reading.short_delivery"
    SET_ACCEPT = "set.accept"
    SET_REDO = "set.redo"
    SESSION_PAUSE = "session.pause"
    SESSION_RESUME = "session.resume"
    SESSION_STOP = "session.stop"
    SESSION_ABORT = "session.abort"
    SESSION_CLOSE = "session.close"
    SESSION_REVIEW = "session.review"
    VISIT_START = "visit.start"
    VISIT_ADD_BEAM = "visit.add_beam"
    VISIT_START_BEAM = "visit.start_beam"
    VISIT_SKIP_BEAM = "visit.skip_beam"
    VISIT_CONFIRM_AIR = "visit.confirm_air"
    VISIT_CLOSE = "visit.close"
    VISIT_REVIEW = "visit.review"
    REGISTER_LIST = "register.list"
    REGISTER_ADD = "register.add"
    REGISTER_SUPERSEDE = "register.supersede"
    REGISTER_PICK = "register.pick"
    ENVIRONMENT_READ = "environment.read"


#: The calibration visit's methods (answered beside the engine's actions; the snapshot's
#: ``visit`` shows the visit they act on).
VISIT_ACTIONS: tuple[str, ...] = (
    Method.VISIT_START,
    Method.VISIT_ADD_BEAM,
    Method.VISIT_START_BEAM,
    Method.VISIT_SKIP_BEAM,
    Method.VISIT_CONFIRM_AIR,
    Method.VISIT_CLOSE,
)


#: Methods that change the measurement; the snapshot's ``allowed`` is a subset of these.
OPERATOR_ACTIONS: tuple[str, ...] = (
    Method.SESSION_START,
    Method.ENVIRONMENT_SET,
    Method.STEP_ARM,
    Method.STEP_MANUAL_DONE,
    Method.STEP_SKIP,
    Method.READING_CAPTURE,
    Method.READING_SHORT,
    Method.SET_ACCEPT,
    Method.SET_REDO,
    Method.SESSION_PAUSE,
    Method.SESSION_RESUME,
    Method.SESSION_STOP,
    Method.SESSION_ABORT,
    Method.SESSION_CLOSE,
)

NOTIFY_SNAPSHOT = "snapshot"
NOTIFY_DELTA = "delta"
NOTIFY_EVENT = "event"

PRESSURE_UNITS = ("kPa", "hPa", "mmHg")
REVIEW_DECISIONS = ("approve", "reject")
#: What the station's registers hold, one kind per row (``register.*`` requests).
REGISTER_KINDS = (
    "machine",
    "beam",
    "chamber",
    "certificate",
    "electrometer",
    "thermometer",
    "barometer",
    "k_Q",
)


# ---------------------------------------------------------------------------------------------
# Method parameters, declared as data (the daemon checks them with validate_params)
# ---------------------------------------------------------------------------------------------
ParamKind = Literal["string", "number", "integer", "boolean", "object", "string_or_object"]


class Param(NamedTuple):
    """One named parameter of a method: its JSON kind, whether it is required, what it means."""

    name: str
    kind: ParamKind
    required: bool = False
    doc: str = ""
    choices: tuple[str, ...] = ()


class MethodSpec(NamedTuple):
    """A method: its parameters (by name), what it does and what it returns."""

    name: str
    doc: str
    params: tuple[Param, ...] = ()
    result: str = "the snapshot after the change"


#: The parameters of a review, of a session or of a visit.
REVIEW_PARAMS: tuple[Param, ...] = (
    Param("decision", "string", required=True, choices=REVIEW_DECISIONS),
    Param("reviewer", "string", required=True, doc="the reviewer's name"),
    Param("comment", "string", required=True, doc="why, in the reviewer's words"),
    Param(
        "allow_self_review", "boolean", doc="let the operator who measured review (default false)"
    ),
)
REVIEW_DB_PARAM = Param(
    "db", "string", doc="the station file the client means; refused if the daemon keeps another"
)
REVIEW_RESULT = "the review: status, reviewer, comment, reviewed_at, account, measured_by"
#: The MU per reading a session (or a visit's beam) is started with, instead of the plan's.
MU_PER_READING_PARAM = Param(
    "mu_per_reading",
    "number",
    doc="MU per reading of the plan's compared steps, instead of the plan's",
)

METHODS: dict[str, MethodSpec] = {
    spec.name: spec
    for spec in (
        MethodSpec(
            Method.HELLO,
            "Name this connection; `operator` becomes the actor of its requests in the audit log.",
            (
                Param("client", "string", doc="program name, e.g. 'console'"),
                Param("operator", "string", doc="the person at the keyboard"),
            ),
            result="HelloResult: protocol_version, daemon_pid, socket, state",
        ),
        MethodSpec(
            Method.SUBSCRIBE,
            "Start `delta` and `event` notifications on this connection.",
            result="the current snapshot, the base of the first delta",
        ),
        MethodSpec(Method.UNSUBSCRIBE, "Stop notifications on this connection.", result="{}"),
        MethodSpec(Method.STATUS, "Return the current snapshot.", result="the current snapshot"),
        MethodSpec(
            Method.SESSION_START,
            "Open a session: metadata (machine, beam, chamber, electrometer, calibration, "
            "convention, beam type, expected output, tolerance) and a plan (a shipped plan's "
            "name, or a plan as a dict; default: the daemon's --plan).",
            (
                Param("metadata", "object", required=True, doc="session metadata"),
                Param("plan", "string_or_object", doc="plan name or plan dict"),
                MU_PER_READING_PARAM,
            ),
        ),
        MethodSpec(
            Method.ENVIRONMENT_SET,
            "Record the chamber's air temperature and pressure (an append-only entry).",
            (
                Param("temperature_C", "number", required=True, doc="°C, 10 to 40"),
                Param("pressure", "number", required=True, doc="in pressure_unit"),
                Param("pressure_unit", "string", doc="default kPa", choices=PRESSURE_UNITS),
                Param("humidity_pct", "number", doc="relative humidity, %"),
                Param("source", "string", doc="where the values come from, e.g. 'barometer'"),
            ),
        ),
        MethodSpec(
            Method.STEP_ARM,
            "Start the current step's reading set (or continue an interrupted one): the daemon "
            "zeroes and arms the electrometer for each reading in turn.",
        ),
        MethodSpec(
            Method.STEP_MANUAL_DONE,
            "Confirm that the manual action the prompt asks for (e.g. turning the bias switch) "
            "was done by hand; recorded with who and when.",
            (Param("note", "string", doc="optional remark for the audit log"),),
        ),
        MethodSpec(Method.STEP_SKIP, "Skip the current step; only optional steps can be skipped."),
        MethodSpec(
            Method.READING_CAPTURE,
            "Capture the charge integrated so far as a reading now (manual capture).",
        ),
        MethodSpec(
            Method.READING_SHORT,
            "Record that the delivery of a reading of the session stopped short, with the MU "
            "the treatment machine reports as delivered and why; the results refer the "
            "reading to the planned MU.",
            (
                Param("reading", "integer", required=True, doc="the reading's id"),
                Param("actual_MU", "number", required=True, doc="MU delivered, below planned"),
                Param("reason", "string", required=True, doc="why the delivery stopped short"),
            ),
        ),
        MethodSpec(Method.SET_ACCEPT, "Accept the reviewed set and move to the next step."),
        MethodSpec(
            Method.SET_REDO,
            "Redo the current step: the present set is kept, marked superseded with the reason.",
            (Param("reason", "string", required=True, doc="why the set is redone"),),
        ),
        MethodSpec(
            Method.SESSION_PAUSE,
            "Hold the sequence; a reading in progress is dropped (and logged), nothing recorded "
            "is lost.",
        ),
        MethodSpec(Method.SESSION_RESUME, "Return to the state the session was paused from."),
        MethodSpec(
            Method.SESSION_STOP,
            "End the session early as finished, with results from the sets accepted so far.",
            (Param("reason", "string", required=True, doc="why the session ends early"),),
        ),
        MethodSpec(
            Method.SESSION_ABORT,
            "Abandon the session: status aborted, the open set aborted, everything kept.",
            (
                Param("reason", "string", required=True, doc="why the session is abandoned"),
                Param("confirm", "boolean", required=True, doc="must be true"),
            ),
        ),
        MethodSpec(
            Method.SESSION_CLOSE,
            "Leave a finished or aborted session and return to idle (ready for a new one).",
        ),
        MethodSpec(
            Method.SESSION_REVIEW,
            "Record the review of a finished or aborted session by a second person (any closed "
            "session of the station, not only the current one): approved or rejected, with a "
            "comment; the reviewer is the actor, the connection's Unix account is kept beside.",
            (
                Param("session", "integer", required=True, doc="the session id"),
                *REVIEW_PARAMS,
                REVIEW_DB_PARAM,
            ),
            result=REVIEW_RESULT,
        ),
        MethodSpec(
            Method.VISIT_START,
            "Open a calibration visit: one sitting at one treatment machine, several beams.",
            (
                Param("machine", "string", required=True, doc="the treatment machine"),
                Param(
                    "metadata",
                    "object",
                    required=True,
                    doc="operator; air_max_age_min (default 30); register_ids; notes",
                ),
            ),
        ),
        MethodSpec(
            Method.VISIT_ADD_BEAM,
            "Add a beam to the open visit, after the others: its session metadata (its name "
            "is the metadata's beam; two beams of one name are refused) and its plan.",
            (
                Param("metadata", "object", required=True, doc="the beam's session metadata"),
                Param("plan", "string", doc="a shipped plan's name or a file; default: --plan"),
                Param(
                    "register_ids",
                    "object",
                    doc="the beam's rows in the station registers, by register name (optional)",
                ),
            ),
        ),
        MethodSpec(
            Method.VISIT_START_BEAM,
            "Start the session of a beam of the visit (planned, skipped or left unfinished).",
            (
                Param("beam", "string", required=True, doc="the beam's name"),
                MU_PER_READING_PARAM,
            ),
        ),
        MethodSpec(
            Method.VISIT_SKIP_BEAM,
            "Record a beam of the visit as skipped, with the reason.",
            (
                Param("beam", "string", required=True, doc="the beam's name"),
                Param("reason", "string", required=True, doc="why it is not measured"),
            ),
        ),
        MethodSpec(
            Method.VISIT_CONFIRM_AIR,
            "Record the air temperature and pressure last read in this visit again for the "
            "beam being measured, as confirmed by the operator; refused when they were read "
            "more than the visit's air_max_age_min ago.",
        ),
        MethodSpec(
            Method.VISIT_CLOSE,
            "Close the visit; beams never measured are recorded unfinished with the reason.",
            (Param("reason", "string", doc="needed when a beam was not measured"),),
        ),
        MethodSpec(
            Method.VISIT_REVIEW,
            "Record the review of a closed visit by a second person, as session.review does "
            "for a session.",
            (
                Param("visit", "integer", required=True, doc="the visit id"),
                *REVIEW_PARAMS,
                REVIEW_DB_PARAM,
            ),
            result=REVIEW_RESULT,
        ),
        MethodSpec(
            Method.REGISTER_LIST,
            "List the station's register rows (machines, beams, chambers, certificates, "
            "electrometers, thermometers, barometers, k_Q), each with its name in words.",
            (
                Param("kind", "string", doc="only rows of this kind", choices=REGISTER_KINDS),
                Param("include_superseded", "boolean", doc="superseded rows too (default false)"),
            ),
            result="{rows: [register row with its name]}",
        ),
        MethodSpec(
            Method.REGISTER_ADD,
            "Add a register entry (its first row); the connection's operator is the actor.",
            (
                Param("kind", "string", required=True, doc="the kind", choices=REGISTER_KINDS),
                Param("fields", "object", required=True, doc="field -> value"),
                Param("effective_from", "string", doc="YYYY-MM-DD (default: today)"),
                Param("db", "string", doc="the station file the client means"),
            ),
            result="the row added",
        ),
        MethodSpec(
            Method.REGISTER_SUPERSEDE,
            "Supersede a register row with its fields changed as given; the old row is kept.",
            (
                Param("row", "integer", required=True, doc="the current row of the entry"),
                Param("fields", "object", required=True, doc="field -> new value"),
                Param("reason", "string", required=True, doc="why, in words"),
                Param("effective_from", "string", doc="YYYY-MM-DD (default: today)"),
                Param("db", "string", doc="the station file the client means"),
            ),
            result="the new row",
        ),
        MethodSpec(
            Method.ENVIRONMENT_READ,
            "Read the air temperature and pressure from the daemon's environment sensor "
            "(serve --sensor-port) now, its certificate corrections from the registers applied, "
            "and record them as an entry whose source names the sensor. The daemon also reads "
            "it by itself when a session starts and before each set.",
        ),
        MethodSpec(
            Method.REGISTER_PICK,
            "Say what a session using these register rows would be given: the metadata they "
            "fill and the warnings (an expired or missing certificate, no k_Q ...). Writes "
            "nothing; send the ids as `registers` in session.start's metadata to use them.",
            (Param("registers", "object", required=True, doc="kind -> row id"),),
            result="{registers: kind -> row id, fields: metadata, warnings: [text]}",
        ),
    )
}


class ParamsError(ValueError):
    """A request's params are wrong; ``field``, ``value`` and ``allowed`` say how."""

    def __init__(self, field: str, value: Any, allowed: str) -> None:
        self.field = field
        self.value = value
        self.allowed = allowed
        super().__init__(f"{field} = {value!r} is not allowed: expected {allowed}")

    def data(self) -> ErrorData:
        """Return the JSON-RPC ``error.data`` for this error."""
        return {"field": self.field, "value": _jsonable(self.value), "allowed": self.allowed}


def _jsonable(value: Any) -> Any:
    try:
        json.dumps(value, allow_nan=False)
    except (TypeError, ValueError):
        return repr(value)
    return value


_KIND_CHECKS: dict[str, tuple[str, Any]] = {
    "string": ("a string", lambda v: isinstance(v, str)),
    "number": (
        "a number",
        lambda v: isinstance(v, int | float) and not isinstance(v, bool) and v == v,
    ),
    "integer": ("an integer", lambda v: isinstance(v, int) and not isinstance(v, bool)),
    "boolean": ("true or false", lambda v: isinstance(v, bool)),
    "object": ("a JSON object", lambda v: isinstance(v, dict)),
    "string_or_object": ("a plan name or a plan object", lambda v: isinstance(v, str | dict)),
}


def validate_params(method: str, params: Any) -> dict[str, Any]:
    """Return the params of ``method`` checked against :data:`METHODS` (kinds, required, unknown).

    Raises :class:`ParamsError` naming the field for a missing, unknown or mistyped parameter
    (``"warm"`` where a number belongs, for example), and KeyError for an unknown method.
    Ranges (10–40 °C and so on) are checked by the daemon, which knows the physics limits.
    """
    spec = METHODS[method]
    if params is None:
        params = {}
    if not isinstance(params, dict):
        raise ParamsError("params", params, "a JSON object of named parameters")
    known = {p.name: p for p in spec.params}
    for name in params:
        if name not in known:
            names = ", ".join(known) or "no parameters"
            raise ParamsError(name, params[name], f"one of: {names}")
    for param in spec.params:
        if param.name not in params or params[param.name] is None:
            if param.required:
                raise ParamsError(param.name, None, f"{_KIND_CHECKS[param.kind][0]} (required)")
            continue
        value = params[param.name]
        description, check = _KIND_CHECKS[param.kind]
        if not check(value):
            raise ParamsError(param.name, value, description)
        if param.choices and value not in param.choices:
            raise ParamsError(param.name, value, "one of " + ", ".join(param.choices))
    return dict(params)


# ---------------------------------------------------------------------------------------------
# The snapshot: the whole state, sent after every change
# ---------------------------------------------------------------------------------------------
#: A flag's severity as a text marker, the same in the console, the CLI and the reports, so that
#: meaning never rests on colour: "!!" error, "!" warning, "i" information.
SEVERITY_MARKERS: dict[str, str] = {"error": "!!", "warning": "!", "info": "i"}
#: Severities, worst first: every list of flags is shown in this order.
SEVERITY_ORDER: tuple[str, ...] = ("error", "warning", "info")


def severity_rank(flag: Any) -> int:
    """Return where a flag (a dict or an object with ``severity``) sorts: 0 for the worst."""
    severity = flag.get("severity") if isinstance(flag, Mapping) else flag.severity
    return SEVERITY_ORDER.index(severity) if severity in SEVERITY_ORDER else 1


def by_severity(flags: Sequence[T]) -> list[T]:
    """Return ``flags`` worst first, keeping their own order within a severity."""
    return sorted(flags, key=severity_rank)


class FlagInfo(TypedDict):
    """A stability or plausibility flag, in words (from ``corrections``)."""

    code: str
    message: str
    severity: str  # info | warning | error


class ReadingInfo(TypedDict):
    """One stored reading. ``settling`` readings are kept and shown but not used in results."""

    id: int
    seq: int  # 1, 2, ... within its set, settling readings included (the stored order)
    label: str  # how the reading is named everywhere: "s1", "s2" settling, then "1", "2", ...
    t_s: float  # instrument clock, s
    charge_nC: float  # signed as read
    capture: str  # auto | pushed | manual
    settling: bool
    status: str  # the instrument's status for the value (ok, overrange, ...)
    recorded_at: str  # UTC ISO time it was committed
    flags: list[FlagInfo]  # per-reading flags (sign against bias, outlier, ...)


class SetInfo(TypedDict):
    """A reading set (one attempt at one plan step), superseded and interrupted ones included."""

    id: int
    step_index: int
    step_key: str
    purpose: str  # leakage | warmup | routine | opposite | reduced | return_check
    polarity: int  # +1 | -1
    bias_V: float  # signed
    attempt: int  # 1 for the first try, 2 after one redo, ...
    status: str  # collecting | reviewing | accepted | superseded | interrupted | aborted
    reason: str | None  # why it was superseded / interrupted / aborted
    readings: list[ReadingInfo]
    readings_needed: int  # readings used for results (settling readings not counted)
    readings_done: int  # non-settling readings taken so far
    stats: dict[str, Any] | None  # statistics of the non-settling readings (from corrections)
    flags: list[FlagInfo]  # set-level flags


class StepInfo(TypedDict):
    """A plan step and how far it has got."""

    index: int
    key: str
    purpose: str
    polarity: int
    bias_V: float
    readings: int
    mu_per_reading: float
    optional: bool
    prompt: str
    status: str  # pending | current | accepted | skipped


class PromptInfo(TypedDict):
    """What the operator must do now, in plain words."""

    #: start | environment | manual | arm | deliver_beam | review | interrupted | paused | done
    #: | record_fault (the record cannot commit: no beam, no action until it can)
    kind: str
    text: str
    manual_action: NotRequired[dict[str, Any]]  # e.g. {"action": "set_bias", "volts": -300}


class LiveReading(TypedDict):
    """The reading in progress."""

    phase: str  # a ReadingPhase value
    charge_nC: float | None  # latest sample
    elapsed_s: float | None  # since the reading was armed (instrument clock)
    seq: int | None  # the seq it will get when captured
    label: str | None  # the label it will get when captured ("s1" while settling, "3", ...)


class InstrumentInfo(TypedDict):
    """The electrometer as the daemon sees it."""

    connected: bool
    profile: str
    identity: str | None  # manufacturer, model, serial, firmware as reported
    capabilities: list[str]
    message: str | None  # plain words when something is wrong (e.g. 'disconnected, retrying')
    bench: bool  # True when the daemon drives a simulated linac (--bench-control)


class RecordInfo(TypedDict):
    """Whether the station database can commit now."""

    writable: bool
    message: str | None  # "record not writable: <cause>" and what is held in memory, or None


class EnvironmentInfo(TypedDict):
    """The latest environment entry of the session."""

    temperature_C: float
    pressure_kPa: float
    pressure_entered: float
    pressure_unit: str
    humidity_pct: float | None
    source: str
    recorded_at: str


class SessionInfo(TypedDict):
    """The session's stored row, decoded."""

    id: int
    status: str  # open | finished | aborted | interrupted
    created_at: str
    metadata: dict[str, Any]
    convention: str
    beam: str
    plan_name: str
    reason: str | None


class Snapshot(TypedDict):
    """The whole daemon state, as sent in ``snapshot`` notifications and method results.

    ``results`` is ``chargebook.corrections.evaluate.Evaluation.to_dict()`` computed by
    ``acquire.session.evaluation.evaluate_session`` from the accepted sets, the environment
    entry in force for each set (``results["set_air"][set]["entry"]`` is its position, from 1,
    in ``environment_entries``), the session's thresholds and metadata; factors not yet measured are
    *pending* (``factor_states``) and values that depend on them are null; k_pol and k_s of an
    output check are *carried* (``results["carried"]``: value, source, date, age_days). While a
    set of a step without an accepted set is being collected, its readings are included
    provisionally and ``results_provisional`` is true.
    """

    seq: int  # increases with every snapshot
    state: str  # an EngineState value
    paused_from: str | None
    allowed: list[str]  # operator actions legal now (subset of OPERATOR_ACTIONS)
    prompt: PromptInfo
    notice: str | None  # something the engine did that the operator must know (a reading dropped)
    session: SessionInfo | None
    plan: list[StepInfo]
    step_index: int | None
    current_set: SetInfo | None
    sets: list[SetInfo]
    live: LiveReading
    environment: EnvironmentInfo | None
    environment_entries: list[EnvironmentInfo]  # every entry of the session, oldest first
    results: dict[str, Any] | None
    results_provisional: bool
    results_error: str | None  # why results could not be computed from what is recorded
    instrument: InstrumentInfo
    record: RecordInfo
    caution: str
    #: The calibration visit shown (open, or just closed): its beams in order with status and
    #: results (``acquire.session.visit_summary``), its review, and ``air`` (when the air data
    #: were last read in it); absent or None outside a visit.
    visit: NotRequired[dict[str, Any] | None]
    #: The plans a setup may choose (the daemon's own first): name, description,
    #: mu_per_reading of the compared steps, daemon_default.
    plans: NotRequired[list[dict[str, Any]]]


class SetChange(TypedDict):
    """What changed in one set the base snapshot already held (in a :class:`Delta`): its keys
    other than ``readings`` whose value changed, and its readings new or changed, by position.
    A reading added to a set of sixty sends that one reading (and the set's new statistics),
    not the sixty."""

    id: int
    changed: dict[str, Any]  # the set's keys (not ``readings``) whose value changed, new values
    readings_count: int  # how many readings the set holds now
    readings_at: list[tuple[int, ReadingInfo]]  # (position from 0, reading) new or changed


class Delta(TypedDict):
    """What changed from the snapshot of seq ``base_seq`` to the one of seq ``seq`` (params of
    the ``delta`` notification; see :func:`snapshot_delta` and :func:`apply_delta`)."""

    seq: int
    base_seq: int
    changed: dict[str, Any]  # the top-level Snapshot keys whose value changed, new values
    sets: list[SetInfo]  # sets new since the base, whole, in the snapshot's order
    #: Sets the base held that changed, each as what changed in it (in the snapshot's order).
    set_changes: NotRequired[list[SetChange]]
    #: The current set is this one of the snapshot's sets (sent once, not again as
    #: ``current_set``).
    current_set_id: NotRequired[int]


class DeltaGap(ValueError):
    """A delta does not apply to the snapshot held: its base is another snapshot."""


def set_change(old: Mapping[str, Any], new: Mapping[str, Any]) -> SetChange:
    """Return the :class:`SetChange` that turns set entry ``old`` into ``new`` (the same id)."""
    old_readings, new_readings = old.get("readings") or [], new.get("readings") or []
    return {
        "id": new["id"],
        "changed": {
            key: value
            for key, value in new.items()
            if key != "readings" and (key not in old or old[key] != value)
        },
        "readings_count": len(new_readings),
        "readings_at": [
            (index, reading)
            for index, reading in enumerate(new_readings)
            if index >= len(old_readings) or old_readings[index] != reading
        ],
    }


def changed_set(entry: Mapping[str, Any], change: Mapping[str, Any]) -> dict[str, Any]:
    """Return set ``entry`` with ``change`` (a :class:`SetChange`) applied (``entry`` is left as
    it was; its readings that did not change are the very objects it held)."""
    readings = list(entry.get("readings") or [])[: change["readings_count"]]
    for index, reading in change["readings_at"]:
        if index < len(readings):
            readings[index] = reading
        elif index == len(readings):
            readings.append(reading)
        else:
            raise DeltaGap(f"set {entry['id']} has no reading at position {index - 1}")
    if len(readings) != change["readings_count"]:
        raise DeltaGap(
            f"set {entry['id']} would hold {len(readings)} readings, not {change['readings_count']}"
        )
    return {**entry, **change["changed"], "readings": readings}


_ID = operator.itemgetter("id")


def snapshot_delta(old: Mapping[str, Any], new: Mapping[str, Any]) -> Delta:
    """Return the :class:`Delta` that turns snapshot ``old`` into snapshot ``new``.

    Sets are compared one by one (by position, their ids checked): new sets are sent whole, a
    set that changed as what changed in it (its new readings, its statistics: a
    :class:`SetChange`). When ``new`` does not extend ``old``'s sets (another session),
    ``sets`` is sent whole among ``changed``. The current set, when it is one of the new
    snapshot's sets, is named by its id (``current_set_id``) instead of being sent again.
    """
    changed = {
        key: value
        for key, value in new.items()
        if key not in ("seq", "sets") and (key not in old or old[key] != value)
    }
    old_sets, new_sets = old.get("sets") or [], new.get("sets") or []
    held = len(old_sets)
    # compared in C, a pass over each list: a session may hold hundreds of sets, and this
    # runs at every reading
    extends = len(new_sets) >= held and list(map(_ID, old_sets)) == list(
        map(_ID, itertools.islice(new_sets, held))
    )
    delta: Delta = {"seq": new["seq"], "base_seq": old["seq"], "changed": changed, "sets": []}
    if not extends:
        changed["sets"] = new_sets
    else:
        delta["sets"] = new_sets[held:]
        moved = itertools.compress(range(held), map(operator.is_not, old_sets, new_sets))
        changes = [
            set_change(old_sets[index], new_sets[index])
            for index in moved
            if old_sets[index] != new_sets[index]
        ]
        if changes:
            delta["set_changes"] = changes
    current = changed.get("current_set")
    if current is not None and any(
        entry["id"] == current["id"] and (entry is current or entry == current)
        for entry in reversed(new_sets)
    ):
        del changed["current_set"]
        delta["current_set_id"] = current["id"]
    return delta


def apply_delta(snapshot: Mapping[str, Any], delta: Mapping[str, Any]) -> dict[str, Any]:
    """Return the snapshot ``delta`` leads to from ``snapshot`` (which is left as it was).

    What did not change is the very object of ``snapshot`` (a client can tell what to redraw
    by identity). Raises :class:`DeltaGap` when ``snapshot`` is not the delta's base, or a
    set it changes is not held as the delta expects.
    """
    if snapshot.get("seq") != delta["base_seq"]:
        raise DeltaGap(
            f"the delta applies to snapshot {delta['base_seq']}, not to {snapshot.get('seq')}"
        )
    result = {**snapshot, **delta["changed"], "seq": delta["seq"]}
    changes = delta.get("set_changes") or []
    if delta["sets"] or changes:
        sets = list(result.get("sets") or [])
        where = {entry["id"]: index for index, entry in enumerate(sets)}
        for change in changes:
            if change["id"] not in where:
                raise DeltaGap(f"the delta changes set {change['id']}, which is not held")
            index = where[change["id"]]
            sets[index] = changed_set(sets[index], change)
        sets.extend(delta["sets"])
        result["sets"] = sets
    if "current_set_id" in delta:
        wanted = delta["current_set_id"]
        result["current_set"] = next(s for s in reversed(result["sets"]) if s["id"] == wanted)
    return result


class EventInfo(TypedDict):
    """One audit-log entry, as committed (params of the ``event`` notification)."""

    id: int
    session_id: int | None
    recorded_at: str
    actor: str
    kind: str
    detail: dict[str, Any]


class HelloResult(TypedDict):
    protocol_version: str
    daemon_pid: int
    socket: str
    state: str


# ---------------------------------------------------------------------------------------------
# Messages
# ---------------------------------------------------------------------------------------------
def request(
    request_id: int | str, method: str, params: dict[str, Any] | None = None
) -> dict[str, Any]:
    """Return a JSON-RPC request object."""
    message: dict[str, Any] = {"jsonrpc": JSONRPC, "id": request_id, "method": method}
    if params:
        message["params"] = params
    return message


def notification(method: str, params: Any) -> dict[str, Any]:
    """Return a JSON-RPC notification object (a request without an id)."""
    return {"jsonrpc": JSONRPC, "method": method, "params": params}


def result_response(request_id: int | str | None, result: Any) -> dict[str, Any]:
    """Return a JSON-RPC success response."""
    return {"jsonrpc": JSONRPC, "id": request_id, "result": result}


def error_response(
    request_id: int | str | None, code: int, message: str, data: Any | None = None
) -> dict[str, Any]:
    """Return a JSON-RPC error response; ``data`` is included when given."""
    error: dict[str, Any] = {"code": code, "message": message}
    if data is not None:
        error["data"] = data
    return {"jsonrpc": JSONRPC, "id": request_id, "error": error}


def encode(message: dict[str, Any], limit_bytes: int = MAX_MESSAGE_BYTES) -> bytes:
    """Return ``message`` as one line of UTF-8 JSON ending in a newline.

    Raises ValueError if the line would exceed ``limit_bytes`` (a client's request limit unless
    the daemon passes :data:`MAX_DAEMON_MESSAGE_BYTES` for its own messages).
    """
    line = json.dumps(message, separators=(",", ":"), allow_nan=False).encode() + b"\n"
    if len(line) > limit_bytes:
        raise ValueError(
            f"message is {len(line)} bytes, more than the limit of {limit_bytes} bytes"
        )
    return line


def encode_from_daemon(message: dict[str, Any]) -> bytes:
    """Return a message of the daemon's as one line, bounded by MAX_DAEMON_MESSAGE_BYTES."""
    return encode(message, MAX_DAEMON_MESSAGE_BYTES)


# ---------------------------------------------------------------------------------------------
# Where the socket lives
# ---------------------------------------------------------------------------------------------
SOCKET_NAME = "daemon.sock"
#: The watch-only socket, beside the control socket: it answers WATCH_METHODS, nothing else.
WATCH_SOCKET_NAME = "watch.sock"
WATCH_METHODS = frozenset({Method.HELLO, Method.SUBSCRIBE, Method.STATUS})
WATCH_ONLY = "this is the watch-only socket: actions are taken on the control socket"


def default_socket_dir() -> Path:
    """Return the directory for the daemon's socket: ``$XDG_RUNTIME_DIR/chargebook``, else
    ``<tmp>/chargebook-<uid>``. The daemon creates it with mode 0700."""
    import tempfile  # here, not at the top: `chargebook --help` does not need it

    runtime = os.environ.get("XDG_RUNTIME_DIR")
    if runtime and Path(runtime).is_dir():
        return Path(runtime) / "chargebook"
    return Path(tempfile.gettempdir()) / f"chargebook-{os.getuid()}"


def default_socket_path() -> Path:
    """Return the default socket path (``default_socket_dir() / 'daemon.sock'``)."""
    return default_socket_dir() / SOCKET_NAME


def socket_directory_problem(
    directory: Path, gid: int | None = None, *, client: bool = False
) -> str | None:
    """Return why ``directory`` is no safe home for the daemon's socket, or None when it is.

    Safe means a real directory (not a symlink, which another user could point elsewhere) that
    nobody outside may enter or change. For the daemon (``client=False``): owned by this user,
    mode 0700, or with a socket group ``gid`` owned by that group and mode 0750. A client also
    accepts a directory of another user that is 0750 and owned by a group this user belongs to
    (a daemon run as a service account with a socket group), except the per-user directory
    named for this user's uid. The daemon refuses to listen in an unsafe one and a client
    refuses to talk through one: another local user who pre-creates ``/tmp/chargebook-<uid>``
    must not receive an operator's actions.
    """
    import stat

    try:
        info = directory.lstat()
    except FileNotFoundError:
        return f"{directory} does not exist (is the daemon running?)"
    if stat.S_ISLNK(info.st_mode):
        return f"{directory} is a symbolic link; the socket's directory must be a real one"
    if not stat.S_ISDIR(info.st_mode):
        return f"{directory} is not a directory"
    mode = stat.S_IMODE(info.st_mode)
    mine = info.st_uid == os.getuid()
    if client:
        return _client_directory_problem(directory, info, mode, mine)
    if not mine:
        return f"{directory} belongs to another user (uid {info.st_uid})"
    if gid is None and mode & 0o077:
        return f"{directory} can be entered by other users (mode {mode:o}); it must be 0700"
    if gid is not None and info.st_gid != gid:
        return f"{directory} is owned by group {info.st_gid}, not the socket group ({gid})"
    if gid is not None and mode & 0o027:
        return f"{directory} can be changed or entered by others (mode {mode:o}); it must be 0750"
    return None


def _client_directory_problem(directory: Path, info: Any, mode: int, mine: bool) -> str | None:
    if mode & 0o027:
        return (
            f"{directory} can be changed or entered by others (mode {mode:o}); it must be 0700, "
            "or 0750 for a socket group"
        )
    if mine:
        return None
    if info.st_gid not in {os.getgid(), *os.getgroups()} or not mode & 0o050:
        return f"{directory} belongs to another user (uid {info.st_uid}) and not to your group"
    import tempfile

    if directory == Path(tempfile.gettempdir()) / f"chargebook-{os.getuid()}":
        return f"{directory} is named for your uid but belongs to another user (uid {info.st_uid})"
    return None
