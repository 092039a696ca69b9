"""The Monte Carlo cross-check of the uncertainty (GUM Supplement 1, JCGM 101:2008).

Each Type A set mean is drawn from a scaled and shifted t distribution, x̄ + (s/√n)·t_{n−1}
(JCGM 101 6.4.9); each Type B input from a normal distribution (a relative input with finite
degrees of freedom, such as a between-set term, from a t distribution likewise). The draws go
through the factor formulas *without* the input range checks: a draw of the temperature at
9.95 °C when 10.0 °C was measured is a legitimate draw, not an input error. The output is the
dose (or the corrected charge), relative to its value at the estimates.

Reported: the probabilistically symmetric coverage interval (the (1−p)/2 and (1+p)/2 quantiles
of the draws, JCGM 101 7.7), beside the analytic y ± U, and whether they agree within the
numerical tolerance δ of JCGM 101 8.2 (δ = ½·10^l, u_c written as c·10^l with c of
``VALIDATION_SIGNIFICANT_DIGITS`` digits). The standard deviation of the draws is reported only
when every t distribution has a finite variance (more than 2 degrees of freedom, that is at
least 4 readings per set); otherwise the intervals are the comparison.

Nothing here raises: a Monte Carlo that cannot be computed returns a result whose ``note`` says
why, in words. Seeded with numpy.random.default_rng(seed): the same inputs give the same result.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from chargebook.corrections.air_density import KELVIN_OFFSET_PROTOCOL
from chargebook.corrections.conventions import constants
from chargebook.corrections.recombination import k_s_unchecked
from chargebook.corrections.uncertainty import (
    MONTE_CARLO_SEED,
    MONTE_CARLO_TRIALS,
    VALIDATION_SIGNIFICANT_DIGITS,
    Estimate,
    ModelInputs,
)

#: Largest share of draws the model may have no value for (a drawn charge ratio at n, a drawn
#: routine mean of the wrong sign) before the Monte Carlo is declared not computable. Far below
#: the 2.5 % in each tail of a 95 % interval, so the interval cannot be moved by them.
MAX_INVALID_SHARE = 1e-3


@dataclass(frozen=True)
class MonteCarloCheck:
    """The Monte Carlo result: its interval beside the analytic one (relative, % of y).

    ``interval_pct`` and ``analytic_interval_pct`` are (low, high) as % deviations from the
    model's value at the estimates; None when not computed. ``agrees`` None: not judged.
    """

    trials: int
    seed: int
    coverage_probability: float
    computed: bool
    note: str
    u_combined_pct: float | None = None
    interval_pct: tuple[float, float] | None = None
    analytic_interval_pct: tuple[float, float] | None = None
    tolerance_pct: float | None = None
    agrees: bool | None = None
    invalid_draws: int = 0

    def to_dict(self) -> dict[str, object]:
        """Return the result as JSON-ready plain types."""
        return {
            "trials": self.trials,
            "seed": self.seed,
            "coverage_probability": self.coverage_probability,
            "computed": self.computed,
            "note": self.note,
            "u_combined_pct": self.u_combined_pct,
            "interval_pct": None if self.interval_pct is None else list(self.interval_pct),
            "analytic_interval_pct": (
                None if self.analytic_interval_pct is None else list(self.analytic_interval_pct)
            ),
            "tolerance_pct": self.tolerance_pct,
            "agrees": self.agrees,
            "invalid_draws": self.invalid_draws,
        }


def validation_tolerance_pct(u_c_pct: float, digits: int = VALIDATION_SIGNIFICANT_DIGITS) -> float:
    """Return JCGM 101 8.2's δ = ½·10^l for u_c (%) written as c·10^l with ``digits`` digits."""
    exponent = math.floor(math.log10(u_c_pct)) - (digits - 1)
    return 0.5 * 10.0**exponent


def _draw(rng: np.random.Generator, estimate: Estimate, trials: int) -> np.ndarray:
    u = estimate.u or 0.0
    if u == 0.0:
        return np.full(trials, estimate.value)
    if math.isfinite(estimate.dof):
        return estimate.value + u * rng.standard_t(estimate.dof, trials)
    return rng.normal(estimate.value, u, trials)


def _k_TP_unchecked(
    model: ModelInputs, temperature: np.ndarray, pressure: np.ndarray
) -> np.ndarray:
    reference = constants(model.convention)
    return (
        (KELVIN_OFFSET_PROTOCOL + temperature)
        / (KELVIN_OFFSET_PROTOCOL + reference.reference_temperature_C)
        * (reference.reference_pressure_kPa / pressure)
    )


def _output(
    model: ModelInputs, rng: np.random.Generator | None, trials: int, include_dose: bool
) -> np.ndarray:
    """Return the model output for ``trials`` draws (rng None: once, at the estimates)."""

    def draw(estimate: Estimate) -> np.ndarray:
        if rng is None:
            return np.full(trials, estimate.value)
        return _draw(rng, estimate, trials)

    routine = draw(model.routine_nC)
    output = np.abs(routine)
    if model.opposite_nC is not None:
        opposite = draw(model.opposite_nC)
        output = output * (np.abs(routine) + np.abs(opposite)) / (2.0 * np.abs(routine))
        output = np.where(np.sign(routine) == np.sign(opposite), np.nan, output)
    if model.has_k_s:
        ratio = routine / draw(model.reduced_nC)
        output = output * k_s_unchecked(
            ratio, model.voltage_ratio, model.beam, model.convention, model.use_boag
        )
    if model.has_k_TP:
        output = output * _k_TP_unchecked(
            model, draw(model.temperature_C), draw(model.pressure_kPa)
        )
    for item in model.relative_inputs:
        if item.u_rel_pct is not None and (include_dose or item.in_charge):
            output = output * draw(Estimate(1.0, item.u_rel_pct / 100.0, item.dof))
    return output


def _finite_variance(model: ModelInputs) -> bool:
    estimates = [model.routine_nC, model.opposite_nC, model.reduced_nC]
    dofs = [e.dof for e in estimates if e is not None and e.u] + [
        item.dof for item in model.relative_inputs if item.u_rel_pct
    ]
    return all(dof > 2 for dof in dofs)


def monte_carlo_check(
    model: ModelInputs | None,
    u_c_pct: float | None,
    U_pct: float | None,
    coverage_probability: float,
    trials: int = MONTE_CARLO_TRIALS,
    seed: int = MONTE_CARLO_SEED,
    include_dose: bool = True,
) -> MonteCarloCheck:
    """Return the Monte Carlo cross-check of the analytic u_c and U = k u_c (both % of y).

    Never raises: when it cannot be computed the result says why in ``note``.
    """
    base = {"trials": trials, "seed": seed, "coverage_probability": coverage_probability}
    if model is None or u_c_pct is None or U_pct is None:
        return MonteCarloCheck(
            **base,
            computed=False,
            note="not computed: the analytic uncertainty is not known yet",
        )
    with np.errstate(all="ignore"):
        estimate = float(_output(model, None, 1, include_dose)[0])
        draws = _output(model, np.random.default_rng(seed), trials, include_dose)
    # A finite draw is a value of the model, however far out in a tail (a heavy-tailed t draw may
    # even push a factor below zero); only NaN and inf mark draws the formulas cannot evaluate.
    invalid = ~np.isfinite(draws)
    count = int(invalid.sum())
    if not math.isfinite(estimate) or estimate <= 0 or count > MAX_INVALID_SHARE * trials:
        return MonteCarloCheck(
            **base,
            computed=False,
            invalid_draws=count,
            note=(
                f"cannot be computed: {count} of {trials} draws fell where the model has no "
                "value (a drawn charge ratio M1/M2 at the voltage ratio n, or drawn means of "
                "the two polarities with one sign), because the reading sets scatter too "
                "much. The analytic uncertainty stands alone; look at the flags on the reading "
                "sets."
            ),
        )
    relative = 100.0 * (draws[~invalid] / estimate - 1.0)
    tail = 50.0 * (1.0 - coverage_probability)
    low, high = (float(q) for q in np.percentile(relative, [tail, 100.0 - tail]))
    tolerance = validation_tolerance_pct(u_c_pct)
    agrees = bool(max(abs(low + U_pct), abs(high - U_pct)) <= tolerance)
    finite = _finite_variance(model)
    u_mc = float(np.std(relative, ddof=1)) if finite else None
    words = [
        f"{100 * coverage_probability:g} % interval {low:+.3f} % to {high:+.3f} % beside the "
        f"analytic ±{U_pct:.3f} %: "
        + (
            f"they agree within the JCGM 101 tolerance of {tolerance:g} %"
            if agrees
            else f"they DISAGREE by more than the JCGM 101 tolerance of {tolerance:g} %: "
            "the analytic U is not reliable here, use the Monte Carlo interval"
        )
    ]
    if not finite:
        words.append(
            "no Monte Carlo standard uncertainty: a set of 3 or fewer readings gives a t "
            "distribution without a finite variance (JCGM 101 6.4.9)"
        )
    if count:
        words.append(f"{count} of {trials} draws had no model value and were left out")
    return MonteCarloCheck(
        **base,
        computed=True,
        note="; ".join(words),
        u_combined_pct=u_mc,
        interval_pct=(low, high),
        analytic_interval_pct=(-float(U_pct), float(U_pct)),
        tolerance_pct=tolerance,
        agrees=agrees,
        invalid_draws=count,
    )


def monte_carlo_u_pct(
    model: ModelInputs,
    trials: int = MONTE_CARLO_TRIALS,
    seed: int = MONTE_CARLO_SEED,
    include_dose: bool = True,
) -> float:
    """Return the relative standard deviation (%) of the Monte Carlo draws of the output.

    NaN when the draws cannot give one; never raises. With ``include_dose`` False, N_D,w and
    k_Q are held fixed (the corrected charge alone).
    """
    with np.errstate(all="ignore"):
        draws = _output(model, np.random.default_rng(seed), trials, include_dose)
    valid = draws[np.isfinite(draws)]
    if valid.size < 2:
        return math.nan
    return float(100.0 * np.std(valid, ddof=1) / np.mean(valid))
