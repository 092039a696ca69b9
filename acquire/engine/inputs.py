"""The engine's inputs: one frozen record for everything that can change a session.

An operator action with its parameters and actor, an environment entry, a sample the engine
consumed, a clock tick that ended a settling wait, the instrument lost or back, the daemon
restarting: each is one :class:`Input`. :meth:`Engine.apply
<chargebook.acquire.engine.engine.Engine.apply>` is the only way the engine's state changes,
and it appends the input to the station's input log (table ``inputs``) in the same transaction
as all of its effects. The daemon builds inputs from requests (:func:`from_request`), samples
and ticks; a replay rebuilds them from the log (:func:`from_logged`) and applies them again.

``clock_s`` is the engine's clock when the input was applied (s, the driver's monotonic clock);
the engine reads no other clock while applying an input, so the log holds every time it used
(when a reading was armed, when a settling wait ends).
"""

from __future__ import annotations

import dataclasses
import hashlib
import sys
from array import array
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from operator import attrgetter
from pathlib import Path
from typing import Any, ClassVar

from chargebook.acquire.protocol import Method
from chargebook.acquire.session.plan import Plan

#: Who the daemon names as the actor of the inputs it gives itself (samples, ticks, ...).
DAEMON_ACTOR = "daemon"
#: A plan as the engine may be given it: a Plan, a shipped plan's name, a TOML path, a plan dict.
PlanSource = Plan | str | Path | Mapping[str, Any]


@dataclass(frozen=True, slots=True, kw_only=True)
class Input:
    """One input to the engine: who gave it, and the engine's clock when it was applied."""

    #: The name of the input in the log (``inputs.kind``).
    kind: ClassVar[str] = ""
    #: The request (``acquire/protocol.Method``) an operator gives it with, if any.
    method: ClassVar[str | None] = None

    actor: str = DAEMON_ACTOR
    clock_s: float | None = None

    def fields(self) -> dict[str, Any]:
        """Return the input's own fields (not ``actor``), as they are logged (JSON values)."""
        return {
            name: value if type(value := getattr(self, name)) in _JSON_SCALARS else _logged(value)
            for name in _logged_names(type(self))
        }


#: The names of the fields each class of input logs, found once per class.
_LOGGED_NAMES: dict[type, tuple[str, ...]] = {}


def _logged_names(kind: type[Input]) -> tuple[str, ...]:
    """Return the names of the fields an input of class ``kind`` logs (all but ``actor``),
    found once per class: the daemon logs every sample that leads to a reading."""
    names = _LOGGED_NAMES.get(kind)
    if names is None:
        found = (f.name for f in dataclasses.fields(kind) if f.name != "actor")
        names = _LOGGED_NAMES[kind] = tuple(found)
    return names


#: Values logged as they are: JSON holds them with no conversion.
_JSON_SCALARS = frozenset({float, int, str, bool, type(None)})


def _logged(value: Any) -> Any:
    """Return ``value`` as JSON can hold it (a plan object as its dict)."""
    to_dict = getattr(value, "to_dict", None)
    return to_dict() if callable(to_dict) else value


@dataclass(frozen=True, slots=True, kw_only=True)
class StartSession(Input):
    """Open a session: its metadata, and a plan (name, dict or Plan; None: the default).

    ``replay_of``: the session a replay starts again (its metadata taken as recorded, carried
    factors included: nothing is looked up again).
    """

    kind: ClassVar[str] = "session_start"
    method: ClassVar[str | None] = Method.SESSION_START
    metadata: dict[str, Any]
    plan: PlanSource | None = None
    replay_of: int | None = None
    #: MU per reading for the plan's compared steps, as the operator chose it (None: the plan's).
    mu_per_reading: float | None = None


@dataclass(frozen=True, slots=True, kw_only=True)
class EnterEnvironment(Input):
    """An environment entry: °C, pressure in ``pressure_unit``, % relative humidity."""

    kind: ClassVar[str] = "environment"
    method: ClassVar[str | None] = Method.ENVIRONMENT_SET
    temperature_C: float
    pressure: float
    pressure_unit: str = "kPa"
    humidity_pct: float | None = None
    source: str = "operator"


@dataclass(frozen=True, slots=True, kw_only=True)
class ShortDelivery(Input):
    """The delivery of ``reading`` (its id) stopped short at ``actual_MU``, for ``reason``."""

    kind: ClassVar[str] = "short_delivery"
    method: ClassVar[str | None] = Method.READING_SHORT
    reading: int
    actual_MU: float
    reason: str


@dataclass(frozen=True, slots=True, kw_only=True)
class Arm(Input):
    """Start the current step's set, or continue an interrupted one."""

    kind: ClassVar[str] = "arm"
    method: ClassVar[str | None] = Method.STEP_ARM


@dataclass(frozen=True, slots=True, kw_only=True)
class ManualDone(Input):
    """The pending manual step (the bias switch) was done by hand."""

    kind: ClassVar[str] = "manual_done"
    method: ClassVar[str | None] = Method.STEP_MANUAL_DONE
    note: str | None = None


@dataclass(frozen=True, slots=True, kw_only=True)
class Skip(Input):
    """Skip the current optional step."""

    kind: ClassVar[str] = "skip"
    method: ClassVar[str | None] = Method.STEP_SKIP


@dataclass(frozen=True, slots=True, kw_only=True)
class Capture(Input):
    """Take the charge integrated so far as a reading, by hand."""

    kind: ClassVar[str] = "capture"
    method: ClassVar[str | None] = Method.READING_CAPTURE


@dataclass(frozen=True, slots=True, kw_only=True)
class Accept(Input):
    """Accept the reviewed set."""

    kind: ClassVar[str] = "accept"
    method: ClassVar[str | None] = Method.SET_ACCEPT


@dataclass(frozen=True, slots=True, kw_only=True)
class Redo(Input):
    """Supersede the current set, for ``reason``, and take it again."""

    kind: ClassVar[str] = "redo"
    method: ClassVar[str | None] = Method.SET_REDO
    reason: str


@dataclass(frozen=True, slots=True, kw_only=True)
class Pause(Input):
    """Hold the sequence."""

    kind: ClassVar[str] = "pause"
    method: ClassVar[str | None] = Method.SESSION_PAUSE


@dataclass(frozen=True, slots=True, kw_only=True)
class Resume(Input):
    """Go on from a pause."""

    kind: ClassVar[str] = "resume"
    method: ClassVar[str | None] = Method.SESSION_RESUME


@dataclass(frozen=True, slots=True, kw_only=True)
class Stop(Input):
    """End the session early as finished, for ``reason``."""

    kind: ClassVar[str] = "stop"
    method: ClassVar[str | None] = Method.SESSION_STOP
    reason: str


@dataclass(frozen=True, slots=True, kw_only=True)
class Abort(Input):
    """Abandon the session, for ``reason``; ``confirm`` must be True."""

    kind: ClassVar[str] = "abort"
    method: ClassVar[str | None] = Method.SESSION_ABORT
    reason: str
    confirm: bool = False


@dataclass(frozen=True, slots=True, kw_only=True)
class Close(Input):
    """Leave a finished or aborted session."""

    kind: ClassVar[str] = "close"
    method: ClassVar[str | None] = Method.SESSION_CLOSE


@dataclass(frozen=True, slots=True, kw_only=True)
class Sample(Input):
    """One sample the engine consumed: receive time ``t_s`` (s, driver's clock), charge in nC,
    whether the instrument marked the reading complete, its status, and ``line_id``, the row
    of the raw traffic line it was parsed from (None when that line could not be recorded)."""

    kind: ClassVar[str] = "sample"
    t_s: float
    charge_nC: float
    complete: bool = False
    status: str = "ok"
    line_id: int | None = None


@dataclass(frozen=True, slots=True, kw_only=True)
class SampleRun(Input):
    """Samples the engine consumed in a row that only moved the charge, logged as one entry.

    Their raw lines are ``count`` consecutive rows of the traffic table from ``first_line_id``
    (each sample parsed from one of them, in order); ``t_s``, ``charge_nC``, ``complete`` and
    ``status`` are the last sample's, and ``digest`` is :func:`run_digest` of all of them, so a
    replay that reads the same lines again proves it re-derived the same samples. ``clock_s``
    is the engine's clock when the last of them was taken (a sample that only moves the charge
    reads no clock). The samples themselves come from the traffic: a replay gives them to
    ``Engine.take_samples``, as the daemon did.
    """

    kind: ClassVar[str] = "sample_run"
    first_line_id: int
    count: int
    t_s: float
    charge_nC: float
    complete: bool = False
    status: str = "ok"
    digest: str

    @property
    def line_ids(self) -> range:
        """Return the traffic rows of the run's lines, in order."""
        return range(self.first_line_id, self.first_line_id + self.count)


_T_S, _CHARGE_NC = attrgetter("t_s"), attrgetter("charge_nC")
_COMPLETE, _STATUS = attrgetter("complete"), attrgetter("status")


def run_digest(samples: Sequence[Any]) -> str:
    """Return the digest (BLAKE2b, 128 bits, hex) of samples' ``t_s`` and ``charge_nC`` (as
    IEEE 754 doubles, little-endian), ``complete`` and ``status`` (its text), in order.

    Each field is gathered in one pass in C (no Python object per sample): a run may hold a
    hundred thousand samples.
    """
    times, charges = array("d", map(_T_S, samples)), array("d", map(_CHARGE_NC, samples))
    if sys.byteorder == "big":
        times.byteswap()
        charges.byteswap()
    digest = hashlib.blake2b(digest_size=16)
    digest.update(times.tobytes())
    digest.update(charges.tobytes())
    digest.update(bytes(map(_COMPLETE, samples)))
    digest.update("\n".join(map(str, map(_STATUS, samples))).encode())
    return digest.hexdigest()


@dataclass(frozen=True, slots=True, kw_only=True)
class Tick(Input):
    """A clock tick at ``clock_s``; logged only when it ended a settling wait."""

    kind: ClassVar[str] = "tick"


@dataclass(frozen=True, slots=True, kw_only=True)
class InstrumentLost(Input):
    """The electrometer went away (or refused a command: ``still_connected``)."""

    kind: ClassVar[str] = "instrument_lost"
    message: str
    still_connected: bool = False


@dataclass(frozen=True, slots=True, kw_only=True)
class BenchRefused(Input):
    """The bench (the simulated linac or bias switch) refused what the daemon asked of it; the
    electrometer is not concerned."""

    kind: ClassVar[str] = "bench_refused"
    message: str


@dataclass(frozen=True, slots=True, kw_only=True)
class InstrumentBack(Input):
    """The electrometer answers again (or for the first time), saying who it is."""

    kind: ClassVar[str] = "instrument_back"
    identity: str | None = None


@dataclass(frozen=True, slots=True, kw_only=True)
class Restart(Input):
    """The daemon started again on the station file and resumes its open session."""

    kind: ClassVar[str] = "restart"


#: Every kind of input, by its name in the log.
KINDS: dict[str, type[Input]] = {
    cls.kind: cls
    for cls in (
        StartSession,
        EnterEnvironment,
        ShortDelivery,
        Arm,
        ManualDone,
        Skip,
        Capture,
        Accept,
        Redo,
        Pause,
        Resume,
        Stop,
        Abort,
        Close,
        Sample,
        SampleRun,
        Tick,
        InstrumentLost,
        InstrumentBack,
        Restart,
        BenchRefused,
    )
}
#: The operator's inputs, by the request that gives them.
BY_METHOD: dict[str, type[Input]] = {
    cls.method: cls for cls in KINDS.values() if cls.method is not None
}


def from_request(method: str, params: dict[str, Any], actor: str) -> Input:
    """Return the input an operator's request gives (``params`` checked by the protocol)."""
    cls = BY_METHOD[method]
    names = {f.name for f in dataclasses.fields(cls)} - {"actor", "clock_s"}
    return cls(actor=actor, **{k: v for k, v in params.items() if k in names})


def from_logged(kind: str, actor: str, detail: dict[str, Any]) -> Input:
    """Return the input a row of the log holds (its ``kind``, ``actor`` and ``detail()``)."""
    cls = KINDS.get(kind)
    if cls is None:
        raise ValueError(f"the input log holds an input of unknown kind {kind!r}")
    return cls(actor=actor, **detail)
