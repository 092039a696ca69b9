"""Measurement plans: the shipped default, the file format, and strict validation."""

from __future__ import annotations

import copy
import itertools
import json
import math
from pathlib import Path

import pytest
from chargebook.acquire.engine.capture import CaptureSettings
from chargebook.acquire.session.plan import (
    CaptureRule,
    Plan,
    SettlingRule,
    Step,
    load_plan,
    shipped_plans,
)
from chargebook.corrections.errors import InputError
from hypothesis import given
from hypothesis import strategies as st

MINIMAL = {
    "name": "two polarities",
    "routine_bias_V": 300,
    "steps": [
        {"key": "plus", "purpose": "routine", "readings": 3, "mu_per_reading": 100},
        {"key": "minus", "purpose": "opposite", "readings": 3, "mu_per_reading": 100},
    ],
}


def test_the_default_plan_ships_and_covers_every_purpose_in_order() -> None:
    assert "default" in shipped_plans()
    plan = load_plan("default")
    assert [s.purpose for s in plan.steps] == [
        "leakage",
        "warmup",
        "routine",
        "opposite",
        "warmup",
        "reduced",
        "return_check",
    ]
    assert [s.bias_V for s in plan.steps] == [300.0, 300.0, 300.0, -300.0, 300.0, 100.0, 300.0]
    assert [s.polarity for s in plan.steps] == [1, 1, 1, -1, 1, 1, 1]
    # Two-voltage method: TRS-398 recommends V1/V2 ≥ 3 (from memory, see docs/physics.md).
    assert plan.voltage_ratio == 3.0
    assert [s.optional for s in plan.steps] == [False] * 6 + [True]


def test_no_default_step_reverses_the_polarity_and_changes_the_bias_at_once() -> None:
    # Issue 12 item 10: a reversal settles more slowly than a change of bias magnitude (common
    # practice), so one settling rule cannot serve both; and every reversal is followed by at
    # least two deliveries not used for dose.
    steps = load_plan("default").steps
    for before, step in itertools.pairwise(steps):
        reversed_ = step.polarity != before.polarity
        resized = abs(step.bias_V) != abs(before.bias_V)
        assert not (reversed_ and resized), step.key
        unused = step.readings if step.purpose == "warmup" else step.settling.discard_first
        if reversed_:
            assert unused >= 2, step.key


def test_default_plan_step_details() -> None:
    plan = load_plan("default")
    leakage, warmup, routine, opposite, back, reduced, check = plan.steps
    assert (leakage.mu_per_reading, leakage.duration_s, leakage.uses_beam) == (0.0, 60.0, False)
    assert (warmup.readings, warmup.mu_per_reading, warmup.settling.is_none) == (2, 500.0, True)
    # Routine: five deliveries of 100 MU, the first one a settling reading.
    assert (routine.readings, routine.mu_per_reading) == (4, 100.0)
    assert routine.settling == SettlingRule(discard_first=1)
    assert routine.deliveries_planned == 5
    # After a polarity reversal the chamber settles more slowly: two settling readings.
    assert opposite.settling.discard_first == 2 and opposite.readings == 4
    assert (reduced.readings, check.readings) == (3, 3)
    # Back at the routine polarity before the bias is lowered: two deliveries, not used.
    assert (back.purpose, back.bias_V, back.readings, back.settling.is_none) == (
        "warmup",
        300.0,
        2,
        True,
    )
    for step in plan.steps:
        # the bias as the console writes it, a negative one with a true minus sign
        assert step.prompt and f"{step.bias_V:+g} V".replace("-", "−") in step.prompt


def test_the_monthly_check_takes_routine_readings_only_at_the_default_routine_bias() -> None:
    assert "monthly-check" in shipped_plans()
    plan, default = load_plan("monthly-check"), load_plan("default")
    assert [s.purpose for s in plan.steps] == ["warmup", "routine"]
    assert plan.routine_bias_V == default.routine_bias_V and plan.reduced_bias_V is None
    routine = plan.steps[1]
    assert routine.mu_per_reading == default.steps[2].mu_per_reading
    assert "Deliver 100 MU per reading" in routine.prompt


def test_the_default_capture_settings_are_accepted_by_the_engine() -> None:
    rule = load_plan("default").capture
    assert rule.hold_s == 2.0 and rule.flat_tolerance_pct == 0.02
    settings = CaptureSettings(**rule.overrides())
    assert settings.hold_s == 2.0
    assert CaptureRule().overrides() == {}


def test_plan_survives_to_dict_json_and_back() -> None:
    plan = load_plan("default")
    stored = json.loads(json.dumps(plan.to_dict()))
    assert Plan.from_dict(stored) == plan
    assert stored["steps"][3]["bias_V"] == -300.0 and stored["steps"][3]["polarity"] == "opposite"


def test_a_plain_list_of_steps_is_a_plan() -> None:
    plan = Plan(
        "bare",
        (
            Step("plus", "routine", 1, 300.0, 3, 100.0),
            Step("minus", "opposite", -1, -300.0, 3, 100.0),
        ),
        routine_bias_V=300.0,
    )
    assert Plan.from_dict(MINIMAL).steps == tuple(
        Step(s.key, s.purpose, s.polarity, s.bias_V, s.readings, s.mu_per_reading)
        for s in plan.steps
    )
    assert "Reverse the polarity: set the bias to -300 V" in plan.steps[1].prompt
    assert "3 readings" in plan.steps[1].prompt


def test_negative_routine_polarity_flips_every_step() -> None:
    data = copy.deepcopy(MINIMAL)
    data["routine_bias_V"] = -250
    data["reduced_bias_V"] = -100
    data["steps"].append({"key": "low", "purpose": "reduced", "readings": 3, "mu_per_reading": 100})
    plan = Plan.from_dict(data)
    assert [s.bias_V for s in plan.steps] == [-250.0, 250.0, -100.0]
    assert plan.routine_polarity == -1 and plan.voltage_ratio == 2.5


def test_load_plan_from_a_file(tmp_path: Path) -> None:
    path = tmp_path / "lab.toml"
    path.write_text(
        'name = "lab"\nroutine_bias_V = 400.0\nreduced_bias_V = 100.0\n'
        "[defaults]\nreadings = 3\nmu_per_reading = 200.0\n"
        '[[steps]]\nkey = "r"\npurpose = "routine"\n'
        '[[steps]]\nkey = "s"\npurpose = "reduced"\nsettling = { until_stable_pct = 0.1 }\n',
        encoding="utf-8",
    )
    plan = load_plan(path)
    assert [(s.bias_V, s.readings, s.mu_per_reading) for s in plan.steps] == [
        (400.0, 3, 200.0),
        (100.0, 3, 200.0),
    ]
    assert plan.steps[1].settling.until_stable_pct == 0.1
    assert plan.voltage_ratio == 4.0
    assert load_plan(str(path)) == plan


def _with(path: str, value: object) -> dict:
    """Return MINIMAL with the value at a dotted path (``steps.0.readings``) set or deleted."""
    data = copy.deepcopy(MINIMAL)
    *parents, last = path.split(".")
    target = data
    for part in parents:
        target = target[int(part)] if part.isdigit() else target[part]
    if value is DELETE:
        del target[last]
    else:
        target[int(last) if last.isdigit() else last] = value
    return data


DELETE = object()


@pytest.mark.parametrize(
    ("path", "value", "field"),
    [
        ("colour", "blue", "colour"),
        ("steps.0.redings", 5, "steps[0].redings"),
        ("steps.0.readings", "5", "steps[0].readings"),
        ("steps.0.readings", 4.0, "steps[0].readings"),
        ("steps.0.readings", 0, "steps[0].readings"),
        ("steps.1.mu_per_reading", 0, "steps[1].mu_per_reading"),
        ("steps.1.mu_per_reading", -100, "steps[1].mu_per_reading"),
        ("steps.1.mu_per_reading", DELETE, "steps[1].mu_per_reading"),
        # Bias magnitudes 10–1000 V: common practice (docs/physics.md, plausible input ranges).
        ("routine_bias_V", 5, "routine_bias_V"),
        ("routine_bias_V", -1500, "routine_bias_V"),
        ("routine_bias_V", True, "routine_bias_V"),
        ("routine_bias_V", DELETE, "routine_bias_V"),
        ("reduced_bias_V", 300, "reduced_bias_V"),
        ("reduced_bias_V", -100, "reduced_bias_V"),
        ("steps.1.key", "plus", "steps[1].key"),
        ("steps.1.key", "Minus Side", "steps[1].key"),
        ("steps.0.purpose", "calibrate", "steps[0].purpose"),
        ("steps.1.polarity", "routine", "steps[1].polarity"),
        ("steps.0.bias", "reduced", "steps[0].bias"),
        ("steps.0.bias_V", -300, "steps[0].bias_V"),
        ("steps.0.optional", "yes", "steps[0].optional"),
        ("steps.0.prompt", "  ", "steps[0].prompt"),
        ("steps.0.settling", {"discard_first": -1}, "steps[0].settling.discard_first"),
        ("steps.0.settling", {"wait": 3}, "steps[0].settling.wait"),
        ("steps.0.settling", {"until_stable_pct": 0}, "steps[0].settling.until_stable_pct"),
        ("steps.0.duration_s", 30, "steps[0].duration_s"),
        ("capture", {"hold_s": -1}, "capture.hold_s"),
        ("capture", {"hold": 1}, "capture.hold"),
        ("steps", [], "steps"),
        ("name", "", "name"),
    ],
)
def test_bad_plans_are_refused_naming_the_field(path: str, value: object, field: str) -> None:
    data = _with(path, value)
    with pytest.raises(InputError) as caught:
        Plan.from_dict(data)
    assert caught.value.field == field
    assert str(caught.value).startswith(field)


def test_leakage_steps_have_no_beam_and_a_duration() -> None:
    base = {"name": "leak", "routine_bias_V": 300}
    ok = Plan.from_dict({**base, "steps": [{"key": "l", "purpose": "leakage", "duration_s": 30}]})
    assert ok.steps[0].duration_s == 30 and ok.steps[0].mu_per_reading == 0.0
    with pytest.raises(InputError, match=r"steps\[0\]\.duration_s is missing"):
        Plan.from_dict({**base, "steps": [{"key": "l", "purpose": "leakage"}]})
    with pytest.raises(InputError, match=r"steps\[0\]\.mu_per_reading = 100 .*without beam"):
        Plan.from_dict(
            {
                **base,
                "steps": [
                    {"key": "l", "purpose": "leakage", "duration_s": 30, "mu_per_reading": 100}
                ],
            }
        )


def test_a_reduced_step_needs_a_reduced_bias() -> None:
    data = _with("steps.1", {"key": "low", "purpose": "reduced", "readings": 3})
    data["steps"][1]["mu_per_reading"] = 100
    with pytest.raises(InputError, match=r"steps\[1\]\.bias = 'reduced' has no value"):
        Plan.from_dict(data)


def test_direct_construction_is_checked_too() -> None:
    with pytest.raises(InputError, match="bias_V = -300 contradicts polarity"):
        Step("x", "routine", 1, -300.0, 3, 100.0)
    with pytest.raises(InputError, match=r"steps\[0\]\.bias_V"):
        Plan("p", (Step("x", "opposite", 1, 300.0, 3, 100.0),), routine_bias_V=300.0)
    with pytest.raises(InputError, match=r"steps\[1\]\.bias_V = 200 is neither"):
        Plan(
            "p",
            (Step("a", "warmup", 1, 300.0, 1, 100.0), Step("b", "warmup", 1, 200.0, 1, 100.0)),
            routine_bias_V=300.0,
        )


def test_unknown_names_and_unreadable_files_are_refused(tmp_path: Path) -> None:
    with pytest.raises(InputError, match=r"plan = 'nightly' was not found .*default"):
        load_plan("nightly")
    with pytest.raises(InputError, match="was not found"):
        load_plan(tmp_path / "missing.toml")
    broken = tmp_path / "broken.toml"
    broken.write_text('name = "x"\nsteps = [', encoding="utf-8")
    with pytest.raises(InputError, match="cannot be read"):
        load_plan(broken)


def test_step_lookup_by_key() -> None:
    plan = load_plan("default")
    assert plan.step("reduced").bias_V == 100.0
    with pytest.raises(InputError, match="step = 'nope' is not in the plan"):
        plan.step("nope")


@given(
    routine=st.integers(min_value=20, max_value=1000),
    divisor=st.sampled_from([2.0, 2.5, 3.0, 4.0, 5.0]),
    sign=st.sampled_from([1, -1]),
    readings=st.integers(min_value=1, max_value=20),
    mu=st.floats(min_value=0.1, max_value=1000, allow_nan=False),
    discard=st.integers(min_value=0, max_value=5),
)
def test_any_valid_plan_round_trips(routine, divisor, sign, readings, mu, discard) -> None:
    reduced = routine / divisor
    if reduced < 10:
        reduced = 10.0
    data = {
        "name": "generated",
        "routine_bias_V": sign * routine,
        "reduced_bias_V": sign * reduced,
        "defaults": {
            "readings": readings,
            "mu_per_reading": mu,
            "settling": {"discard_first": discard},
        },
        "steps": [
            {"key": p, "purpose": p} for p in ("routine", "opposite", "reduced", "return_check")
        ],
    }
    if reduced >= routine:
        with pytest.raises(InputError, match="reduced_bias_V"):
            Plan.from_dict(data)
        return
    plan = Plan.from_dict(data)
    assert Plan.from_dict(json.loads(json.dumps(plan.to_dict()))) == plan
    assert [s.polarity for s in plan.steps] == [sign, -sign, sign, sign]
    assert all(s.deliveries_planned == readings + discard for s in plan.steps)


def test_result_steps_of_unequal_mu_are_refused_naming_the_step() -> None:
    # k_pol = (|M+| + |M-|) / (2|M|) and the two-voltage k_s compare mean charges of sets
    # (IAEA TRS-398), which only holds when every set took the same MU per reading.
    data = copy.deepcopy(MINIMAL)
    data["steps"][1]["mu_per_reading"] = 200
    with pytest.raises(InputError, match=r"steps\[1\]\.mu_per_reading") as refused:
        Plan.from_dict(data)
    assert "100 MU" in str(refused.value)


def test_warm_up_may_take_more_mu_than_the_result_steps() -> None:
    data = copy.deepcopy(MINIMAL)
    data["steps"].insert(
        0, {"key": "warm", "purpose": "warmup", "readings": 2, "mu_per_reading": 500}
    )
    assert [s.mu_per_reading for s in Plan.from_dict(data).steps] == [500, 100, 100]


def _settling_deficits(steps: tuple[Step, ...] | list[Step]) -> dict[str, float]:
    """Return each result step's mean settling deficit over its used readings, under the
    simulator's model: a deficit s0·exp(−MU/τ) after a change, s0 larger for a reversal."""
    from chargebook.drivers_generic.simulator.physics import ChamberParameters

    p = ChamberParameters()
    deficits: dict[str, float] = {}
    bias, deficit, since = steps[0].bias_V, 0.0, math.inf
    for step in steps:
        if step.purpose == "leakage":
            continue
        if (step.bias_V > 0) != (bias > 0):
            deficit, since = p.settling_polarity, 0.0
        elif abs(step.bias_V) != abs(bias):
            deficit, since = p.settling_bias, 0.0
        bias = step.bias_V
        used = []
        for index in range(step.deliveries_planned):
            if index >= step.settling.discard_first and step.purpose != "warmup":
                used.append(deficit * math.exp(-since / p.settling_tau_MU))
            since += step.mu_per_reading
        if used:
            deficits[step.purpose] = sum(used) / len(used)
    return deficits


def test_the_default_order_no_longer_biases_M1_over_M2_high() -> None:
    # Issue 12 item 10. With the reduced-bias step straight after the reversal, the reversal's
    # deficit (0.4 %, the simulator's invented model) was still 1.2e-4 on the reduced-bias mean,
    # biasing M1/M2 high; settled back at the routine polarity first, the bias change alone
    # leaves under 5e-5. The simulator's parameters are invented: a demonstration, not physics.
    steps = list(load_plan("default").steps)
    now = _settling_deficits(steps)
    old_order = [s for s in steps if s.key != "back_to_routine"]
    before = _settling_deficits(old_order)
    assert before["reduced"] - before["routine"] > 1e-4
    assert now["reduced"] - now["routine"] < 5e-5
