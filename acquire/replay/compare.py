"""Comparing a replayed session with its original: every reading and every result, exactly.

A reading is compared on its set (step and attempt), its place in the set, its charge in nC,
whether it was a settling reading, how it was captured, the instrument's status, its time and
its integration time; a reading set on its status and reason; the session on its status; and
the results on every key of ``evaluate(...).to_dict()``. Numbers are compared with ``==``: an
exact replay parses the same bytes, so anything but bit-identical numbers is a difference.

Each difference carries the reason, in words, as far as the replay knows it: a what-if change
(another plan step, another threshold), a command sent with other values, a reading the replay
did not reach, or, in an exact replay, none: then the difference is a fault to look into.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

from chargebook.acquire.record.store import ReadingRow, SetRow, Store
from chargebook.acquire.replay.recording import RecordedLine
from chargebook.acquire.session import rules
from chargebook.corrections.stability import Thresholds

#: Reading fields compared (with its integration time and the raw line it was read from).
READING_FIELDS = ("charge_nC", "settling", "capture", "status", "t_s")
SET_FIELDS = ("purpose", "polarity", "bias_V", "status", "reason")
#: Result keys a threshold can change (the rest follow from readings, plan and metadata).
THRESHOLD_KEYS = ("flags", "sets")
#: Plan changes that change no number (they are listed, never given as a reason).
COSMETIC_PLAN_CHANGES = ("plan name", "plan description")
UNEXPLAINED = "not explained by any change: an exact replay must reproduce it"
#: Why a line of a traffic log (``--traffic-log``) is a difference: only the stored traffic,
#: played as it is, reproduces the session, however equal the results come out.
TRAFFIC_LOG_DIFFERS = "the traffic log played is not the traffic stored with the session"
#: Lines of a traffic log listed where they differ from the stored traffic; the rest counted.
LISTED_LINES = 10


@dataclass(frozen=True, slots=True)
class Change:
    """One thing a what-if replay changed: ``what`` (e.g. ``plan reduced_bias_V``), values."""

    what: str
    original: Any
    replay: Any

    def words(self) -> str:
        """Return the change as ``what original → replay``."""
        return f"{self.what} {_value(self.original)} → {_value(self.replay)}"


@dataclass(frozen=True, slots=True)
class Difference:
    """One value that differs between the original and the replay, and why."""

    what: str
    original: Any
    replay: Any
    why: str


@dataclass
class Comparison:
    """Every difference found, and how much was compared."""

    readings_compared: int
    results_compared: int
    differences: list[Difference] = field(default_factory=list)
    changes: list[Change] = field(default_factory=list)

    @property
    def exact(self) -> bool:
        """Return True when nothing differs."""
        return not self.differences

    def to_dict(self) -> dict[str, Any]:
        """Return the comparison as JSON-ready data."""
        return {
            "exact": self.exact,
            "readings_compared": self.readings_compared,
            "results_compared": self.results_compared,
            "changes": [asdict(c) for c in self.changes],
            "differences": [asdict(d) for d in self.differences],
        }


# ------------------------------------------------------------------------------- changes
def plan_changes(original: Mapping[str, Any], replay: Mapping[str, Any]) -> list[Change]:
    """Return what differs between two stored plans (``Plan.to_dict()``), field by field."""
    changes: list[Change] = []
    for key in sorted(set(original) | set(replay)):
        if key == "steps":
            continue
        if original.get(key) != replay.get(key):
            changes.append(Change(f"plan {key}", original.get(key), replay.get(key)))
    old_steps = {s["key"]: s for s in original.get("steps", [])}
    new_steps = {s["key"]: s for s in replay.get("steps", [])}
    for key in [*old_steps, *(k for k in new_steps if k not in old_steps)]:
        old, new = old_steps.get(key), new_steps.get(key)
        if old is None or new is None:
            changes.append(Change(f"plan step '{key}'", _exists(old), _exists(new)))
            continue
        for name in sorted(set(old) | set(new)):
            if name != "prompt" and old.get(name) != new.get(name):
                changes.append(Change(f"plan step '{key}' {name}", old.get(name), new.get(name)))
    return changes


def threshold_changes(original: Thresholds, replay: Thresholds) -> list[Change]:
    """Return the thresholds that differ."""
    old, new = asdict(original), asdict(replay)
    return [Change(f"threshold {k}", old[k], new[k]) for k in old if old[k] != new[k]]


# ----------------------------------------------------------------------------- comparing
def traffic_differences(
    stored: Sequence[RecordedLine], played: Sequence[RecordedLine]
) -> list[Difference]:
    """Return the lines of a traffic log (``played``) that differ from the session's stored
    traffic in time (s), direction or bytes, the first :data:`LISTED_LINES` by number, then
    how many more, and any lines one holds past the other's end."""
    differing = [
        (old, new)
        for old, new in zip(stored, played, strict=False)
        if (old.raw, old.direction, old.t_s) != (new.raw, new.direction, new.t_s)
    ]
    found = [
        Difference(f"traffic line {old.index + 1}", _line(old), _line(new), TRAFFIC_LOG_DIFFERS)
        for old, new in differing[:LISTED_LINES]
    ]
    if len(differing) > LISTED_LINES:
        more = len(differing) - LISTED_LINES
        found.append(Difference("traffic lines", f"{more} more differ", "", TRAFFIC_LOG_DIFFERS))
    if len(stored) != len(played):
        found.append(Difference("traffic lines", len(stored), len(played), TRAFFIC_LOG_DIFFERS))
    return found


def _line(line: RecordedLine) -> str:
    """Return a traffic line as ``t=… s rx 'text'`` (its bytes decoded, errors shown)."""
    text = line.raw.decode("ascii", errors="backslashreplace").rstrip("\r\n")
    return f"t={line.t_s!r} s {line.direction} {text!r}"


def stored_results(store: Store, session_id: int) -> tuple[dict[str, Any] | None, str | None]:
    """Return (``evaluate(...).to_dict()`` of a stored session, None) or (None, why not)."""
    from chargebook.acquire.session.evaluation import evaluate_session

    found = evaluate_session(store, session_id)
    return found.results(), found.error


@dataclass(frozen=True)
class Explanations:
    """What a replay knows about why something may differ (see :func:`compare_sessions`)."""

    changes: Sequence[Change] = ()
    traffic_notes: Sequence[str] = ()
    stopped: str | None = None


@dataclass(frozen=True)
class _Side:
    """One session's rows, keyed so that the original's and the replay's line up."""

    store: Store
    session_id: int
    sets: dict[SetKey, SetRow]
    readings: dict[ReadingKey, ReadingRow]
    lines: dict[int, str]  # traffic id -> the raw line (bytes that are not text escaped)
    integration_s: dict[int, float]

    @classmethod
    def of(cls, store: Store, session_id: int) -> _Side:
        sets = {(s.step_index, s.step_key, s.attempt): s for s in store.sets(session_id)}
        keys = {s.id: key for key, s in sets.items()}
        readings = {(keys[r.set_id], r.seq): r for r in store.readings(session_id)}
        ids = [r.traffic_id for r in readings.values() if r.traffic_id]
        lines = {
            row_id: line.decode("ascii", errors="backslashreplace")
            for row_id, line in store.traffic_lines(session_id, ids).items()
        }
        times = rules.integration_times(store.events(session_id))
        return cls(store, session_id, sets, readings, lines, times)

    def reading_values(self, key: ReadingKey) -> dict[str, Any] | None:
        """Return the compared values of one reading (None when there is no such reading)."""
        row = self.readings.get(key)
        if row is None:
            return None
        values = {name: getattr(row, name) for name in READING_FIELDS}
        values["integration_s"] = self.integration_s.get(row.id)
        values["raw line"] = self.lines.get(row.traffic_id) if row.traffic_id else None
        return values


def compare_sessions(
    original: Store,
    original_id: int,
    replay: Store,
    replay_id: int,
    explanations: Explanations = Explanations(),
) -> Comparison:
    """Return every difference between session ``original_id`` and its replay."""
    old, new = _Side.of(original, original_id), _Side.of(replay, replay_id)
    why = _Reasons(explanations)
    comparison = Comparison(len(old.readings), 0, changes=list(explanations.changes))
    found = comparison.differences
    old_row, new_row = original.session(original_id), replay.session(replay_id)
    if old_row.status != new_row.status:
        found.append(Difference("session status", old_row.status, new_row.status, why.session()))
    for key in _keys(old.sets, new.sets):
        found += _compare(
            f"set {_set_name(key)}",
            _values(old.sets.get(key), SET_FIELDS),
            _values(new.sets.get(key), SET_FIELDS),
            lambda present, key=key: why.row(key[1], present),
        )
    for key in _keys(old.readings, new.readings):
        old_values, new_values = old.reading_values(key), new.reading_values(key)
        if old_values is not None and old_values["raw line"] is None:
            del old_values["raw line"]  # recorded before readings were linked to their lines
            if new_values is not None:
                del new_values["raw line"]
        found += _compare(
            f"reading {_set_name(key[0])} #{key[1]}",
            old_values,
            new_values,
            lambda present, key=key: why.row(key[0][1], present, reading=True),
        )
    readings_differ = bool(found)
    old_results, old_error = stored_results(original, original_id)
    new_results, new_error = stored_results(replay, replay_id)
    if old_error != new_error:
        found.append(Difference("results error", old_error, new_error, why.result("")))
    old_results, new_results = old_results or {}, new_results or {}
    comparison.results_compared = len(set(old_results) | set(new_results))
    for key in sorted(set(old_results) | set(new_results)):
        old_value, new_value = old_results.get(key), new_results.get(key)
        if not _identical(old_value, new_value):
            reason = why.result(key, readings_differ)
            found.append(Difference(f"result {key}", old_value, new_value, reason))
    return comparison


def _values(row: Any, names: Sequence[str]) -> dict[str, Any] | None:
    return None if row is None else {name: getattr(row, name) for name in names}


def _compare(
    name: str,
    old: dict[str, Any] | None,
    new: dict[str, Any] | None,
    why: Any,
) -> list[Difference]:
    """Return the differences between two rows' values; ``why(present)`` gives the reason."""
    if old is None or new is None:
        if old is new:
            return []
        return [Difference(name, _exists(old), _exists(new), why(False))]
    return [
        Difference(f"{name} {field_name}", old[field_name], new.get(field_name), why(True))
        for field_name in old
        if not _identical(old[field_name], new.get(field_name))
    ]


def _exists(row: Any) -> str:
    return "absent" if row is None else "present"


SetKey = tuple[int, str, int]
ReadingKey = tuple[SetKey, int]


def _keys(old: Mapping[Any, Any], new: Mapping[Any, Any]) -> list[Any]:
    return sorted(set(old) | set(new))


def _set_name(key: SetKey) -> str:
    return f"{key[1]} (attempt {key[2]})"


def _identical(a: Any, b: Any) -> bool:
    """Return True when ``a`` and ``b`` are the same values, floats compared with ``==``."""
    if isinstance(a, Mapping) and isinstance(b, Mapping):
        return a.keys() == b.keys() and all(_identical(a[k], b[k]) for k in a)
    if isinstance(a, list | tuple) and isinstance(b, list | tuple):
        return len(a) == len(b) and all(_identical(x, y) for x, y in zip(a, b, strict=True))
    return type(a) is type(b) and a == b


def _value(value: Any) -> str:
    return "none" if value is None else str(value)


# ------------------------------------------------------------------------------- reasons
NOT_REACHED = "not reached: the replay stopped early (see above)"
STOPPED = "the replay stopped before the end (see above)"
READINGS_DIFFER = "the readings or sets it is computed from differ (see above)"


class _Reasons:
    """Chooses the words that say why a value differs (see the module docstring)."""

    def __init__(self, explanations: Explanations) -> None:
        changes = explanations.changes
        self.plan = [
            c for c in changes if c.what.startswith("plan") and c.what not in COSMETIC_PLAN_CHANGES
        ]
        self.thresholds = [c for c in changes if c.what.startswith("threshold")]
        self.notes = list(explanations.traffic_notes)
        self.stopped = explanations.stopped is not None

    @staticmethod
    def _join(reasons: Sequence[str]) -> str:
        return "; ".join(reasons) if reasons else UNEXPLAINED

    def _words(self, changes: Sequence[Change]) -> list[str]:
        return [change.words() for change in changes]

    def session(self) -> str:
        return self._join([STOPPED] if self.stopped else self._words(self.plan))

    def row(self, step_key: str, present: bool, *, reading: bool = False) -> str:
        """Return why a set or reading of step ``step_key`` differs (``present`` in both?)."""
        if not present and self.stopped:
            return NOT_REACHED
        own = [c for c in self.plan if c.what.startswith(f"plan step '{step_key}'")]
        if reading:
            own += [c for c in self.plan if c.what.startswith("plan capture")]
        reasons = self._words(own or self.plan)
        if reading:
            reasons += self.notes
        return self._join(reasons)

    def result(self, key: str, readings_differ: bool = False) -> str:
        """Return why result ``key`` differs (readings_differ: some reading or set does)."""
        reasons = [STOPPED] if self.stopped else []
        if key in THRESHOLD_KEYS or not key or not self.plan:
            reasons += self._words(self.thresholds)
        reasons += self._words(self.plan)
        if readings_differ:
            reasons.append(READINGS_DIFFER)
        return self._join(reasons)
