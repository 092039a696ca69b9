"""GUM propagation: sensitivity coefficients, root-sum-square, and the Monte Carlo cross-check."""

from __future__ import annotations

import numpy as np
import pytest
from chargebook.corrections.air_density import k_TP
from chargebook.corrections.conventions import Convention
from chargebook.corrections.monte_carlo import monte_carlo_u_pct
from chargebook.corrections.polarity import k_pol
from chargebook.corrections.recombination import Beam, k_s
from chargebook.corrections.uncertainty import (
    Component,
    Estimate,
    ModelInputs,
    RelativeInput,
    budget,
    combine_pct,
)

MODEL = ModelInputs(
    Convention.TRS398,
    Beam.PULSED,
    routine_nC=Estimate(20.00, 0.010),
    opposite_nC=Estimate(-20.06, 0.012),
    reduced_nC=Estimate(19.70, 0.015),
    voltage_ratio=3.0,
    temperature_C=Estimate(21.0, 0.1),
    pressure_kPa=Estimate(100.5, 0.05),
    relative_inputs=(
        RelativeInput("k_elec", 0.1, "Type B"),
        RelativeInput("N_D,w", 0.55, "Type B", in_charge=False),
        RelativeInput("k_Q", 0.6, "Type B", in_charge=False),
    ),
)


def corrected(routine: float, opposite: float, reduced: float, T: float, P: float) -> float:
    """The measurement model written out again for the numerical derivatives."""
    return (
        abs(routine)
        * k_pol(routine, opposite)
        * k_s(routine / reduced, 3.0, "pulsed", "trs398")
        * k_TP(T, P)
    )


def contributions() -> dict[str, float]:
    return {c.component: c.u_rel_pct for c in budget(MODEL)}


@pytest.mark.parametrize(
    ("component", "index", "u"),
    [
        ("routine readings", 0, 0.010),
        ("opposite-polarity readings", 1, 0.012),
        ("reduced-bias readings", 2, 0.015),
        ("temperature", 3, 0.1),
        ("pressure", 4, 0.05),
    ],
)
def test_sensitivities_match_numerical_derivatives(component: str, index: int, u: float) -> None:
    # JCGM 100:2008 §5.1.3: c_i = ∂f/∂x_i, here checked by a central difference of the model.
    x = [20.00, -20.06, 19.70, 21.0, 100.5]
    step = 1e-6 * max(1.0, abs(x[index]))
    up, down = list(x), list(x)
    up[index] += step
    down[index] -= step
    c = (corrected(*up) - corrected(*down)) / (2 * step)
    expected_pct = 100 * abs(c) * u / corrected(*x)
    assert contributions()[component] == pytest.approx(expected_pct, rel=1e-5)


def test_relative_inputs_enter_as_given() -> None:
    found = contributions()
    assert (found["k_elec"], found["N_D,w"], found["k_Q"]) == (0.1, 0.55, 0.6)


def test_root_sum_square() -> None:
    # GUM eq. (10) for uncorrelated inputs in relative form: sqrt(0.3² + 0.4²) = 0.5.
    parts = [Component("a", 0.3, ""), Component("b", 0.4, ""), Component("c", None, "")]
    assert combine_pct(parts) == pytest.approx(0.5, rel=1e-15)


def test_monte_carlo_agrees_with_the_analytic_propagation() -> None:
    # JCGM 101:2008 (GUM Supplement 1) validation of the law of propagation: a seeded Monte
    # Carlo of 200 000 draws has a sampling scatter of about 0.2 % of u; allow 2 %.
    analytic = combine_pct(budget(MODEL))
    assert monte_carlo_u_pct(MODEL, 200_000, seed=7) == pytest.approx(analytic, rel=0.02)


def test_monte_carlo_of_the_charge_leaves_out_N_Dw_and_k_Q() -> None:
    charge_only = combine_pct([c for c in budget(MODEL) if c.in_charge])
    found = monte_carlo_u_pct(MODEL, 200_000, seed=11, include_dose=False)
    assert found == pytest.approx(charge_only, rel=0.02)


def test_monte_carlo_is_deterministic_for_a_seed() -> None:
    assert monte_carlo_u_pct(MODEL, 10_000, seed=3) == monte_carlo_u_pct(MODEL, 10_000, seed=3)


def test_a_single_reading_has_no_type_a_estimate() -> None:
    model = ModelInputs(Convention.TRS398, Beam.PULSED, routine_nC=Estimate(20.0, None))
    (routine,) = budget(model)
    assert routine.u_rel_pct is None


def test_only_the_known_factors_enter_the_budget() -> None:
    model = ModelInputs(Convention.TG51, Beam.PULSED, routine_nC=Estimate(-20.0, 0.004))
    (routine,) = budget(model)
    assert routine.u_rel_pct == pytest.approx(0.02, rel=1e-12)  # 0.004/20 = 0.02 %


def test_budget_lines_are_plain() -> None:
    lines = [c.to_dict() for c in budget(MODEL)]
    assert set(lines[0]) == {"component", "u_rel_pct", "source", "dof"}
    assert np.isfinite([line["u_rel_pct"] for line in lines]).all()
