"""Measurement plans: the steps of a session, as data.

A plan is a TOML file (or the same thing as a dict, which is how a session stores it) listing
the steps the operator goes through: leakage (no beam), warm-up (pre-irradiation), reading sets
at the routine polarity and bias, at the opposite polarity, at the reduced bias (the
two-voltage method), and an optional return-to-start check. ``load_plan("default")`` loads the
plan that ships with chargebook (``acquire/plans/default.toml``).

The file format::

    name = "default"
    description = "..."              # optional
    routine_bias_V = 300.0           # signed: its sign is the routine polarity
    reduced_bias_V = 100.0           # same sign, smaller magnitude; needed by a "reduced" step

    [capture]                        # optional end-of-beam detection settings for the engine;
    hold_s = 2.0                     # any not given keep the engine's defaults
    flat_tolerance_pct = 0.02

    [defaults]                       # optional: what a step that does not say uses
    readings = 4
    mu_per_reading = 100.0
    settling = { discard_first = 1 }

    [[steps]]
    key = "routine"                  # unique within the plan
    purpose = "routine"              # leakage|warmup|routine|opposite|reduced|return_check
    polarity = "routine"             # optional: routine | opposite (follows from the purpose)
    bias = "routine"                 # optional: routine | reduced (follows from the purpose)
    readings = 4                     # readings used for results, settling readings not counted
    mu_per_reading = 100.0           # monitor units delivered for each reading
    settling = { discard_first = 1, wait_s = 0.0, until_stable_pct = 0.1 }
    prompt = "What the operator must do, in plain words"   # optional: one is written for you
    optional = false                 # an optional step may be skipped

A leakage step has no beam: it gives ``duration_s`` (the integration time, s) and no MU.

Everything is checked strictly: an unknown key, a wrong type, a bias magnitude outside
10–1000 V, fewer than one reading or a non-positive MU raises ``InputError`` naming the field
(``steps[3].readings``), the value and what is allowed.
"""

from __future__ import annotations

import math
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field, fields, replace
from importlib import resources
from pathlib import Path
from typing import Any

from chargebook.corrections.errors import InputError
from chargebook.corrections.limits import BIAS_MAGNITUDE_V, MONITOR_UNITS

PURPOSES = ("leakage", "warmup", "routine", "opposite", "reduced", "return_check")
#: The purposes whose mean charges are compared with one another (k_pol, k_s, the return check):
#: they must take the same MU per reading, and their sets are judged for scatter, drift and
#: outliers. Leakage (one timed reading) and warm-up (pre-irradiation) are neither.
COMPARED_PURPOSES = frozenset(("routine", "opposite", "reduced", "return_check"))
#: Purposes whose polarity and bias are fixed by what the step measures.
FIXED_SETTINGS: Mapping[str, tuple[str, str]] = {
    "routine": ("routine", "routine"),
    "opposite": ("opposite", "routine"),
    "reduced": ("routine", "reduced"),
    "return_check": ("routine", "routine"),
}
POLARITY_CHOICES = ("routine", "opposite")
BIAS_CHOICES = ("routine", "reduced")

MAX_READINGS = 100
MAX_DISCARD_FIRST = 20
MAX_SETTLING_READINGS = 50
MAX_WAIT_S = 3600.0
MAX_UNTIL_STABLE_PCT = 10.0
MAX_LEAKAGE_S = 3600.0
KEY_PATTERN = re.compile(r"^[a-z0-9][a-z0-9_-]{0,39}$")


# ------------------------------------------------------------------------------ checks


def _number(field_name: str, value: object, allowed: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise InputError(field_name, value, allowed, "is not a number")
    if not math.isfinite(value):
        raise InputError(field_name, value, allowed, "is not a finite number")
    return float(value)


def _in_range(field_name: str, value: object, low: float, high: float, unit: str = "") -> float:
    allowed = f"{low:g} to {high:g}{' ' + unit if unit else ''}"
    number = _number(field_name, value, allowed)
    if not low <= number <= high:
        raise InputError(field_name, value, allowed)
    return number


def _positive(field_name: str, value: object, high: float, unit: str = "") -> float:
    allowed = f"more than 0, at most {high:g}{' ' + unit if unit else ''}"
    number = _number(field_name, value, allowed)
    if not 0 < number <= high:
        raise InputError(field_name, value, allowed)
    return number


def _whole(field_name: str, value: object, low: int, high: int) -> int:
    allowed = f"a whole number from {low} to {high}"
    if isinstance(value, bool) or not isinstance(value, int):
        raise InputError(field_name, value, allowed, "is not a whole number")
    if not low <= value <= high:
        raise InputError(field_name, value, allowed)
    return value


def _text(field_name: str, value: object) -> str:
    if not isinstance(value, str) or not value.strip():
        raise InputError(field_name, value, "a non-empty text", "is empty or not text")
    return value.strip()


def _flag(field_name: str, value: object) -> bool:
    if not isinstance(value, bool):
        raise InputError(field_name, value, "true or false", "is not true or false")
    return value


def _choice(field_name: str, value: object, allowed: tuple[str, ...]) -> str:
    if not isinstance(value, str) or value not in allowed:
        raise InputError(field_name, value, ", ".join(allowed), "is not known")
    return value


def _table(field_name: str, value: object, known: tuple[str, ...]) -> dict[str, Any]:
    if not isinstance(value, Mapping):
        raise InputError(field_name, value, "a table of " + ", ".join(known), "is not a table")
    for key in value:
        if key not in known:
            prefix = f"{field_name}." if field_name else ""
            raise InputError(f"{prefix}{key}", key, "one of " + ", ".join(known), "is not known")
    return dict(value)


def _prefixed(prefix: str, error: InputError) -> InputError:
    return InputError(f"{prefix}{error.field}", error.value, error.allowed, error.problem)


def _bias_magnitude(field_name: str, value: object) -> float:
    number = _number(field_name, value, BIAS_MAGNITUDE_V.text() + " in magnitude")
    if not BIAS_MAGNITUDE_V.low <= abs(number) <= BIAS_MAGNITUDE_V.high:
        raise InputError(field_name, value, BIAS_MAGNITUDE_V.text() + " in magnitude")
    return number


def _names(cls: type) -> tuple[str, ...]:
    return tuple(f.name for f in fields(cls))


# ------------------------------------------------------------------------- the data


@dataclass(frozen=True, slots=True)
class SettlingRule:
    """Readings and waiting that let the chamber settle before readings count.

    ``wait_s``: wait this long (s) after the bias or polarity is set before the first reading.
    ``discard_first``: the first N readings of the set are settling readings.
    ``until_stable_pct``: after those, readings stay settling readings until one differs from
    the one before it by at most this many percent; after ``max_settling_readings`` such extra
    settling readings the engine stops and asks the operator. Settling readings are kept and
    shown but not used for results, and are not counted in the step's ``readings``.
    """

    discard_first: int = 0
    wait_s: float = 0.0
    until_stable_pct: float | None = None
    max_settling_readings: int = 5

    def __post_init__(self) -> None:
        _whole("discard_first", self.discard_first, 0, MAX_DISCARD_FIRST)
        _in_range("wait_s", self.wait_s, 0.0, MAX_WAIT_S, "s")
        if self.until_stable_pct is not None:
            _positive("until_stable_pct", self.until_stable_pct, MAX_UNTIL_STABLE_PCT, "%")
        _whole("max_settling_readings", self.max_settling_readings, 1, MAX_SETTLING_READINGS)

    @property
    def is_none(self) -> bool:
        """True when the rule asks for no settling at all."""
        return self == SettlingRule()

    def to_dict(self) -> dict[str, Any]:
        """Return the rule as the plan file writes it (unset parts left out)."""
        out: dict[str, Any] = {"discard_first": self.discard_first, "wait_s": self.wait_s}
        if self.until_stable_pct is not None:
            out["until_stable_pct"] = self.until_stable_pct
            out["max_settling_readings"] = self.max_settling_readings
        return out

    @classmethod
    def from_dict(cls, data: object, field_name: str = "settling") -> SettlingRule:
        """Return the rule from a plan table; raise InputError naming the field."""
        table = _table(field_name, data, _names(cls))
        try:
            return cls(**table)
        except InputError as error:
            raise _prefixed(f"{field_name}.", error) from None


@dataclass(frozen=True, slots=True)
class CaptureRule:
    """End-of-beam detection settings the plan asks the engine for; None keeps the default.

    ``rise_threshold_nC``: charge change after arming that means the beam is on (nC).
    ``flat_tolerance_pct`` / ``flat_tolerance_nC``: how flat the charge must stay (% or nC).
    ``hold_s``: how long it must stay flat before end of beam is declared (s).
    """

    rise_threshold_nC: float | None = None
    flat_tolerance_pct: float | None = None
    flat_tolerance_nC: float | None = None
    hold_s: float | None = None

    def __post_init__(self) -> None:
        for name, high, unit in (
            ("rise_threshold_nC", 1e3, "nC"),
            ("flat_tolerance_pct", 10.0, "%"),
            ("flat_tolerance_nC", 1e3, "nC"),
            ("hold_s", 60.0, "s"),
        ):
            value = getattr(self, name)
            if value is not None:
                _positive(name, value, high, unit)

    def overrides(self) -> dict[str, float]:
        """Return the settings the plan sets, as keyword arguments for the engine's settings."""
        return {
            name: getattr(self, name) for name in _names(self) if getattr(self, name) is not None
        }

    @classmethod
    def from_dict(cls, data: object) -> CaptureRule:
        """Return the rule from the plan's ``[capture]`` table; InputError names the field."""
        table = _table("capture", data, _names(cls))
        try:
            return cls(**table)
        except InputError as error:
            raise _prefixed("capture.", error) from None


@dataclass(frozen=True, slots=True)
class Step:
    """One step of a plan: what the operator does and what is read.

    ``polarity`` is +1 or −1 and ``bias_V`` the signed bias (V) resolved from the plan's
    routine and reduced bias. ``readings`` counts the readings used for results (settling
    readings come on top), ``mu_per_reading`` the monitor units per reading (0 for leakage,
    which has no beam and integrates for ``duration_s`` seconds instead).
    """

    key: str
    purpose: str
    polarity: int
    bias_V: float
    readings: int
    mu_per_reading: float
    settling: SettlingRule = field(default_factory=SettlingRule)
    prompt: str = ""
    optional: bool = False
    duration_s: float | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.key, str) or not KEY_PATTERN.match(self.key):
            raise InputError(
                "key",
                self.key,
                "lower-case letters, digits, '_' and '-', at most 40",
                "is not a usable step key",
            )
        _choice("purpose", self.purpose, PURPOSES)
        if self.polarity not in (1, -1) or isinstance(self.polarity, bool):
            raise InputError("polarity", self.polarity, "+1 or -1", "is not a polarity")
        bias_V = _bias_magnitude("bias_V", self.bias_V)
        if math.copysign(1, bias_V) != self.polarity:
            raise InputError("bias_V", bias_V, f"sign {self.polarity:+d}", "contradicts polarity")
        _whole("readings", self.readings, 1, MAX_READINGS)
        _flag("optional", self.optional)
        if not isinstance(self.settling, SettlingRule):
            raise InputError("settling", self.settling, "a SettlingRule", "is not a rule")
        if self.purpose == "leakage":
            self._check_leakage()
        else:
            MONITOR_UNITS.check("mu_per_reading", self.mu_per_reading)
            if self.duration_s is not None:
                raise InputError(
                    "duration_s", self.duration_s, "only on a leakage step", "is not used here"
                )
        if not self.prompt:
            object.__setattr__(self, "prompt", default_prompt(self))
        _text("prompt", self.prompt)

    def _check_leakage(self) -> None:
        if self.mu_per_reading != 0:
            raise InputError(
                "mu_per_reading", self.mu_per_reading, "0 (leakage is read without beam)"
            )
        if self.duration_s is None:
            raise InputError("duration_s", None, "the leakage integration time, s", "is missing")
        _positive("duration_s", self.duration_s, MAX_LEAKAGE_S, "s")

    @property
    def uses_beam(self) -> bool:
        """True for every step but leakage."""
        return self.purpose != "leakage"

    @property
    def deliveries_planned(self) -> int:
        """Return the fewest readings (beam deliveries) the step takes, settling ones included."""
        return self.readings + self.settling.discard_first


def default_prompt(step: Step) -> str:
    """Return what the operator must do for ``step``, in plain words."""
    bias = f"{step.bias_V:+g} V"
    if step.purpose == "leakage":
        return (
            f"Keep the beam off with the chamber at {bias}: the electrometer integrates "
            f"leakage for {step.duration_s:g} s."
        )
    action = {
        "warmup": f"Pre-irradiate the chamber at {bias}",
        "routine": f"Set the bias to {bias} (routine polarity)",
        "opposite": f"Reverse the polarity: set the bias to {bias}",
        "reduced": f"Lower the bias to {bias} (reduced bias)",
        "return_check": f"Return the bias to {bias} to check the start reading",
    }[step.purpose]
    settling = step.settling.discard_first
    extra = f" after {settling} settling reading{'s' if settling != 1 else ''}" if settling else ""
    use = " (not used for dose)" if step.purpose == "warmup" else ""
    plural = "s" if step.readings != 1 else ""
    return (
        f"{action}, then deliver {step.mu_per_reading:g} MU per reading: "
        f"{step.readings} reading{plural}{extra}{use}."
    )


@dataclass(frozen=True, slots=True)
class Plan:
    """A measurement plan: its steps, in order, and the biases they are resolved from.

    ``routine_bias_V`` is signed (its sign is the routine polarity); ``reduced_bias_V`` has the
    same sign and a smaller magnitude, or is None when no step uses it. ``capture`` holds the
    end-of-beam settings the plan sets for the engine.
    """

    name: str
    steps: tuple[Step, ...]
    routine_bias_V: float
    reduced_bias_V: float | None = None
    capture: CaptureRule = field(default_factory=CaptureRule)
    description: str = ""

    def __post_init__(self) -> None:
        _text("name", self.name)
        routine = _bias_magnitude("routine_bias_V", self.routine_bias_V)
        if self.reduced_bias_V is not None:
            reduced = _bias_magnitude("reduced_bias_V", self.reduced_bias_V)
            if math.copysign(1, reduced) != math.copysign(1, routine) or abs(reduced) >= abs(
                routine
            ):
                raise InputError(
                    "reduced_bias_V",
                    reduced,
                    f"the sign of routine_bias_V ({routine:+g} V) and a smaller magnitude",
                )
        if not isinstance(self.steps, tuple) or not self.steps:
            raise InputError("steps", self.steps, "a tuple of one or more steps", "is empty")
        seen: set[str] = set()
        for index, step in enumerate(self.steps):
            if step.key in seen:
                raise InputError(f"steps[{index}].key", step.key, "a key not used before")
            seen.add(step.key)
            self._check_step_bias(index, step)
        self._check_equal_mu()

    def result_mu_per_reading(self) -> float | None:
        """Return the MU per reading of the compared steps (one value, by the equal-MU rule),
        or None for a plan without one."""
        compared = [s.mu_per_reading for s in self.steps if s.purpose in COMPARED_PURPOSES]
        return float(compared[0]) if compared else None

    def with_mu_per_reading(self, mu_per_reading: object) -> Plan:
        """Return the plan with ``mu_per_reading`` MU per reading for every compared step
        (routine, opposite, reduced, return check), checked as a plan is (the MU range, the
        equal-MU rule); leakage and warm-up keep theirs. Each changed step's prompt says the
        new MU where it said the old."""
        if (
            isinstance(mu_per_reading, bool)
            or not isinstance(mu_per_reading, int | float)
            or not math.isfinite(mu_per_reading)
        ):
            raise InputError("mu_per_reading", mu_per_reading, "a number of MU", "is not one")
        mu = float(mu_per_reading)
        steps = tuple(
            replace(
                step,
                mu_per_reading=mu,
                prompt=step.prompt.replace(f"{step.mu_per_reading:g} MU", f"{mu:g} MU"),
            )
            if step.purpose in COMPARED_PURPOSES
            else step
            for step in self.steps
        )
        return replace(self, steps=steps)

    def _check_equal_mu(self) -> None:
        """Refuse result steps of unequal MU: k_pol and k_s are ratios of mean charges."""
        compared = [
            (index, step)
            for index, step in enumerate(self.steps)
            if step.purpose in COMPARED_PURPOSES
        ]
        if not compared:
            return
        first_index, first = compared[0]
        for index, step in compared[1:]:
            if step.mu_per_reading != first.mu_per_reading:
                raise InputError(
                    f"steps[{index}].mu_per_reading",
                    step.mu_per_reading,
                    f"{first.mu_per_reading:g} MU, as steps[{first_index}] ({first.key}): the "
                    "polarity and recombination corrections compare the sets' mean charges",
                    "differs from the other result steps",
                )

    def _check_step_bias(self, index: int, step: Step) -> None:
        polarity, bias = self.settings_of(step)
        expected = FIXED_SETTINGS.get(step.purpose)
        if expected is not None and (polarity, bias) != expected:
            raise InputError(
                f"steps[{index}].bias_V",
                step.bias_V,
                f"the {expected[1]} bias at the {expected[0]} polarity for a {step.purpose} step",
                "does not fit the step's purpose",
            )

    @property
    def routine_polarity(self) -> int:
        """Return +1 or −1, the sign of the routine bias."""
        return 1 if self.routine_bias_V > 0 else -1

    @property
    def voltage_ratio(self) -> float | None:
        """Return n = V1/V2, routine over reduced bias magnitude, or None without a reduced bias."""
        if self.reduced_bias_V is None:
            return None
        return abs(self.routine_bias_V) / abs(self.reduced_bias_V)

    def settings_of(self, step: Step) -> tuple[str, str]:
        """Return (polarity, bias) of a step in words: routine/opposite, routine/reduced."""
        polarity = "routine" if step.polarity == self.routine_polarity else "opposite"
        if abs(step.bias_V) == abs(self.routine_bias_V):
            return polarity, "routine"
        if self.reduced_bias_V is not None and abs(step.bias_V) == abs(self.reduced_bias_V):
            return polarity, "reduced"
        raise InputError(
            f"steps[{self.steps.index(step)}].bias_V",
            step.bias_V,
            "the plan's routine or reduced bias",
            "is neither",
        )

    def step(self, key: str) -> Step:
        """Return the step with ``key``; raise InputError naming the known keys otherwise."""
        for candidate in self.steps:
            if candidate.key == key:
                return candidate
        raise InputError("step", key, ", ".join(s.key for s in self.steps), "is not in the plan")

    def to_dict(self) -> dict[str, Any]:
        """Return the plan as plain data (stored with the session; ``from_dict`` reads it back).

        Every step is written out in full, with its resolved signed ``bias_V`` beside the
        plan's words for it, so the stored plan reads on its own.
        """
        out: dict[str, Any] = {"name": self.name, "routine_bias_V": self.routine_bias_V}
        if self.description:
            out["description"] = self.description
        if self.reduced_bias_V is not None:
            out["reduced_bias_V"] = self.reduced_bias_V
        if self.capture.overrides():
            out["capture"] = self.capture.overrides()
        out["steps"] = [self._step_dict(step) for step in self.steps]
        return out

    def _step_dict(self, step: Step) -> dict[str, Any]:
        polarity, bias = self.settings_of(step)
        out: dict[str, Any] = {
            "key": step.key,
            "purpose": step.purpose,
            "polarity": polarity,
            "bias": bias,
            "bias_V": step.bias_V,
            "readings": step.readings,
        }
        if step.uses_beam:
            out["mu_per_reading"] = step.mu_per_reading
        else:
            out["duration_s"] = step.duration_s
        out["settling"] = step.settling.to_dict()
        out["prompt"] = step.prompt
        out["optional"] = step.optional
        return out

    @classmethod
    def from_dict(cls, data: object) -> Plan:
        """Return the plan described by ``data`` (a parsed plan file, or ``to_dict()``'s output).

        Raises InputError naming the field (``steps[2].readings``) for anything wrong.
        """
        return _PlanReader(data).plan()


# ---------------------------------------------------------------------------- reading


PLAN_KEYS = (
    "name",
    "description",
    "routine_bias_V",
    "reduced_bias_V",
    "capture",
    "defaults",
    "steps",
)
DEFAULTS_KEYS = ("readings", "mu_per_reading", "settling")
STEP_KEYS = (
    "key",
    "purpose",
    "polarity",
    "bias",
    "bias_V",
    "readings",
    "mu_per_reading",
    "duration_s",
    "settling",
    "prompt",
    "optional",
)


class _PlanReader:
    """Turns a plan table into a Plan, naming the field of anything wrong."""

    def __init__(self, data: object) -> None:
        self.table = _table("", data, PLAN_KEYS)
        for required in ("name", "routine_bias_V", "steps"):
            if required not in self.table:
                raise InputError(required, None, _REQUIRED_TEXT[required], "is missing")
        self.defaults = _table("defaults", self.table.get("defaults", {}), DEFAULTS_KEYS)
        self.routine_V = _bias_magnitude("routine_bias_V", self.table["routine_bias_V"])
        reduced = self.table.get("reduced_bias_V")
        self.reduced_V = None if reduced is None else _bias_magnitude("reduced_bias_V", reduced)

    def plan(self) -> Plan:
        steps_data = self.table["steps"]
        if not isinstance(steps_data, list) or not steps_data:
            raise InputError("steps", steps_data, "a list of one or more step tables", "is empty")
        steps = tuple(self._step(index, data) for index, data in enumerate(steps_data))
        description = self.table.get("description", "")
        if not isinstance(description, str):
            raise InputError("description", description, "a text", "is not text")
        return Plan(
            name=_text("name", self.table["name"]),
            steps=steps,
            routine_bias_V=self.routine_V,
            reduced_bias_V=self.reduced_V,
            capture=CaptureRule.from_dict(self.table.get("capture", {})),
            description=description.strip(),
        )

    def _step(self, index: int, data: object) -> Step:
        prefix = f"steps[{index}]."
        try:
            return self._step_unprefixed(data)
        except InputError as error:
            raise _prefixed(prefix, error) from None

    def _step_unprefixed(self, data: object) -> Step:
        table = _table("", data, STEP_KEYS)
        for required in ("key", "purpose"):
            if required not in table:
                raise InputError(required, None, _REQUIRED_TEXT[required], "is missing")
        purpose = _choice("purpose", table["purpose"], PURPOSES)
        polarity_word, bias_word = self._settings(table, purpose)
        polarity = (1 if self.routine_V > 0 else -1) * (1 if polarity_word == "routine" else -1)
        bias_V = polarity * abs(self._bias_magnitude_for(bias_word))
        if "bias_V" in table and _number("bias_V", table["bias_V"], f"{bias_V:g}") != bias_V:
            raise InputError(
                "bias_V",
                table["bias_V"],
                f"{bias_V:+g} V",
                f"contradicts {polarity_word}/{bias_word}",
            )
        leakage = purpose == "leakage"
        settling_data = table.get("settling", {} if leakage else self.defaults.get("settling", {}))
        return Step(
            key=table["key"],
            purpose=purpose,
            polarity=polarity,
            bias_V=bias_V,
            readings=self._value(table, "readings", 1 if leakage else None),
            mu_per_reading=self._value(table, "mu_per_reading", 0.0 if leakage else None),
            settling=SettlingRule.from_dict(settling_data),
            prompt=table.get("prompt", ""),
            optional=table.get("optional", False),
            duration_s=table.get("duration_s"),
        )

    def _settings(self, table: dict[str, Any], purpose: str) -> tuple[str, str]:
        fixed = FIXED_SETTINGS.get(purpose, ("routine", "routine"))
        polarity = _choice("polarity", table.get("polarity", fixed[0]), POLARITY_CHOICES)
        bias = _choice("bias", table.get("bias", fixed[1]), BIAS_CHOICES)
        if purpose in FIXED_SETTINGS and (polarity, bias) != fixed:
            wrong = "polarity" if polarity != fixed[0] else "bias"
            value = polarity if wrong == "polarity" else bias
            expected = fixed[0] if wrong == "polarity" else fixed[1]
            raise InputError(wrong, value, expected, f"does not fit a {purpose} step")
        return polarity, bias

    def _bias_magnitude_for(self, bias_word: str) -> float:
        if bias_word == "routine":
            return self.routine_V
        if self.reduced_V is None:
            raise InputError(
                "bias", "reduced", "routine, or set reduced_bias_V in the plan", "has no value"
            )
        return self.reduced_V

    def _value(self, table: dict[str, Any], name: str, fixed: Any) -> Any:
        """Return the step's ``name``: as given, else ``fixed`` (leakage), else [defaults]."""
        if name in table:
            return table[name]
        if fixed is not None:
            return fixed
        if name not in self.defaults:
            allowed = f"set here or in [defaults]: {_REQUIRED_TEXT[name]}"
            raise InputError(name, None, allowed, "is missing")
        return self.defaults[name]


_REQUIRED_TEXT = {
    "name": "the plan's name",
    "routine_bias_V": "the routine bias in V, signed, 10 to 1000 in magnitude",
    "steps": "a list of one or more [[steps]] tables",
    "key": "a unique step key",
    "purpose": ", ".join(PURPOSES),
    "readings": "a whole number from 1",
    "mu_per_reading": "monitor units per reading, more than 0",
}


# ---------------------------------------------------------------------------- loading


def shipped_plans() -> list[str]:
    """Return the names of the plans that ship with chargebook."""
    folder = resources.files("chargebook.acquire") / "plans"
    return sorted(
        p.name.removesuffix(".toml") for p in folder.iterdir() if p.name.endswith(".toml")
    )


def load_plan(path_or_name: str | Path) -> Plan:
    """Return the plan in a TOML file, or the shipped plan with that name (``"default"``).

    A bare name (no folder, no ``.toml``) means a shipped plan. Raises InputError naming the
    plan when it cannot be found or read, and the field when its content is wrong.
    """
    text = str(path_or_name)
    is_name = isinstance(path_or_name, str) and "/" not in text and not text.endswith(".toml")
    allowed = "a shipped plan (" + ", ".join(shipped_plans()) + ") or a path to a .toml file"
    if is_name:
        source = resources.files("chargebook.acquire") / "plans" / f"{text}.toml"
    else:
        source = Path(path_or_name).expanduser()
    if not source.is_file():
        raise InputError("plan", text, allowed, "was not found")
    try:
        data = tomllib.loads(source.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as error:
        raise InputError("plan", text, "a valid TOML file", f"cannot be read: {error}") from None
    return Plan.from_dict(data)
