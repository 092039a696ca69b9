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

from chargebook.acquire import live
from chargebook.acquire.store import ReadingRow, SetRow, Store
from chargebook.corrections.errors import InputError
from chargebook.corrections.stability import Thresholds

#: Reading fields compared, with the name a difference shows.
READING_FIELDS = ("charge_nC", "settling", "capture", "status", "t_s")
SET_FIELDS = ("purpose", "polarity", "bias_V", "status", "reason")
#: Result keys a threshold can change (the rest follow from readings, plan and metadata).
THRESHOLD_KEYS = ("flags", "sets")
#: Plan changes that change no number (they are listed, never given as a reason).
COSMETIC_PLAN_CHANGES = ("plan name", "plan description")
UNEXPLAINED = "not explained by any change: an exact replay must reproduce it"


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
            changes.append(Change(f"plan step '{key}'", _present(old), _present(new)))
            continue
        for name in sorted(set(old) | set(new)):
            if name != "prompt" and old.get(name) != new.get(name):
                changes.append(Change(f"plan step '{key}' {name}", old.get(name), new.get(name)))
    return changes


def threshold_changes(original: Thresholds, replay: Thresholds) -> list[Change]:
    """Return the thresholds that differ."""
    old, new = asdict(original), asdict(replay)
    return [Change(f"threshold {k}", old[k], new[k]) for k in old if old[k] != new[k]]


def _present(step: Mapping[str, Any] | None) -> str:
    return "absent" if step is None else "present"


# ----------------------------------------------------------------------------- comparing
def stored_results(store: Store, session_id: int) -> tuple[dict[str, Any] | None, str | None]:
    """Return (``evaluate(...).to_dict()`` of a stored session, None) or (None, why not)."""
    row = store.session(session_id)
    events = store.events(session_id)
    try:
        inputs, _ = live.measurement_inputs(
            store,
            session_id,
            live.resolve_plan(row.plan()),
            row.metadata(),
            None,
            live.integration_times(events),
            live.session_thresholds(events),
        )
    except InputError as error:
        return None, f"The results cannot be computed: {error}"
    return live.evaluate_inputs(inputs)


@dataclass(frozen=True)
class Explanations:
    """What a replay knows about why something may differ (see :func:`compare_sessions`)."""

    changes: Sequence[Change] = ()
    traffic_notes: Sequence[str] = ()
    stopped: str | None = None
    arming_times_recorded: bool = True


def compare_sessions(
    original: Store,
    original_id: int,
    replay: Store,
    replay_id: int,
    explanations: Explanations = Explanations(),
) -> Comparison:
    """Return every difference between session ``original_id`` and its replay."""
    old_sets, new_sets = _sets_by_key(original, original_id), _sets_by_key(replay, replay_id)
    old_readings = _readings_by_key(original, original_id, old_sets)
    new_readings = _readings_by_key(replay, replay_id, new_sets)
    why = _Reasons(explanations)
    comparison = Comparison(
        readings_compared=len(old_readings),
        results_compared=0,
        changes=list(explanations.changes),
    )
    differences = comparison.differences
    old_row, new_row = original.session(original_id), replay.session(replay_id)
    if old_row.status != new_row.status:
        differences.append(
            Difference("session status", old_row.status, new_row.status, why.session())
        )
    for key in _keys(old_sets, new_sets):
        differences += _compare_rows(
            f"set {_set_name(key)}", old_sets.get(key), new_sets.get(key), SET_FIELDS, why.set(key)
        )
    for key in _keys(old_readings, new_readings):
        name = f"reading {_set_name(key[0])} #{key[1]}"
        differences += _compare_rows(
            name, old_readings.get(key), new_readings.get(key), READING_FIELDS, why.reading(key)
        )
    differences += _compare_integration(
        original, original_id, replay, replay_id, old_readings, new_readings, why
    )
    old_results, old_error = stored_results(original, original_id)
    new_results, new_error = stored_results(replay, replay_id)
    if old_error != new_error:
        differences.append(Difference("results error", old_error, new_error, why.result("")))
    old_results, new_results = old_results or {}, new_results or {}
    comparison.results_compared = len(set(old_results) | set(new_results))
    readings_differ = any(d.what.startswith("reading") for d in differences)
    for key in sorted(set(old_results) | set(new_results)):
        old_value, new_value = old_results.get(key), new_results.get(key)
        if not _identical(old_value, new_value):
            differences.append(
                Difference(f"result {key}", old_value, new_value, why.result(key, readings_differ))
            )
    return comparison


def _compare_integration(
    original: Store,
    original_id: int,
    replay: Store,
    replay_id: int,
    old_readings: Mapping[Any, ReadingRow],
    new_readings: Mapping[Any, ReadingRow],
    why: _Reasons,
) -> list[Difference]:
    """Return the differences of integration time (s) between readings present in both."""
    old_times = live.integration_times(original.events(original_id))
    new_times = live.integration_times(replay.events(replay_id))
    found = []
    for key, old in old_readings.items():
        new = new_readings.get(key)
        if new is None:
            continue
        a, b = old_times.get(old.id), new_times.get(new.id)
        if not _identical(a, b):
            name = f"reading {_set_name(key[0])} #{key[1]} integration_s"
            found.append(Difference(name, a, b, why.reading(key, timing=True)))
    return found


def _compare_rows(
    name: str, old: Any, new: Any, names: Sequence[str], why: str
) -> list[Difference]:
    if old is None or new is None:
        return [Difference(name, _exists(old), _exists(new), why)]
    return [
        Difference(f"{name} {field_name}", getattr(old, field_name), getattr(new, field_name), why)
        for field_name in names
        if not _identical(getattr(old, field_name), getattr(new, field_name))
    ]


def _exists(row: Any) -> str:
    return "absent" if row is None else "present"


SetKey = tuple[int, str, int]


def _sets_by_key(store: Store, session_id: int) -> dict[SetKey, SetRow]:
    return {(s.step_index, s.step_key, s.attempt): s for s in store.sets(session_id)}


def _readings_by_key(
    store: Store, session_id: int, sets: Mapping[SetKey, SetRow]
) -> dict[tuple[SetKey, int], ReadingRow]:
    keys = {s.id: key for key, s in sets.items()}
    return {(keys[r.set_id], r.seq): r for r in store.readings(session_id)}


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
class _Reasons:
    """Chooses the words that say why a value differs (see the module docstring)."""

    def __init__(self, explanations: Explanations) -> None:
        self.explanations = explanations
        self.plan = [
            c
            for c in explanations.changes
            if c.what.startswith("plan") and c.what not in COSMETIC_PLAN_CHANGES
        ]
        self.thresholds = [c for c in explanations.changes if c.what.startswith("threshold")]

    def _stopped(self) -> list[str]:
        stopped = self.explanations.stopped
        return [f"the replay stopped early: {stopped}"] if stopped else []

    def _join(self, reasons: list[str]) -> str:
        return "; ".join(reasons) if reasons else UNEXPLAINED

    def session(self) -> str:
        return self._join(self._stopped() + [c.words() for c in self.plan])

    def set(self, key: SetKey) -> str:
        step = [c.words() for c in self.plan if c.what.startswith(f"plan step '{key[1]}'")]
        general = [c.words() for c in self.plan if not c.what.startswith("plan step")]
        return self._join(self._stopped() + (step or general or self._plan_words()))

    def reading(self, key: tuple[SetKey, int], *, timing: bool = False) -> str:
        reasons = self._stopped()
        reasons += [c.words() for c in self.plan if c.what.startswith(f"plan step '{key[0][1]}'")]
        reasons += [c.words() for c in self.plan if c.what.startswith("plan capture")]
        reasons += list(self.explanations.traffic_notes)
        if not reasons and self.plan:
            reasons.append("follows from the plan's changes: " + self._plan_words()[0])
        if timing and not self.explanations.arming_times_recorded:
            reasons.append(
                "the session was recorded before arming times were kept, so integration times "
                "are rebuilt from capture times and may differ in the last digits"
            )
        return self._join(reasons)

    def result(self, key: str, readings_differ: bool = False) -> str:
        reasons = self._stopped()
        if self.thresholds and (key in THRESHOLD_KEYS or not key or not self.plan):
            reasons += [c.words() for c in self.thresholds]
        reasons += [c.words() for c in self.plan]
        if readings_differ:
            reasons.append("the readings it is computed from differ (see above)")
        if not reasons and not self.explanations.arming_times_recorded:
            reasons.append(
                "integration times are rebuilt for a session recorded before arming times were kept"
            )
        return self._join(reasons)

    def _plan_words(self) -> list[str]:
        return [", ".join(c.words() for c in self.plan)] if self.plan else []
