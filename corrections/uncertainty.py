"""GUM uncertainty of the corrected charge and the dose (JCGM 100:2008), with a Monte Carlo check.

The measurement model is a product, so relative uncertainties add in quadrature, each multiplied
by its relative sensitivity coefficient (∂ln y/∂ln x):

* Type A: the standard error of the mean of each accepted reading set. The routine reading enters
  M_raw, k_pol and k_s; the opposite-polarity reading k_pol; the reduced-bias reading k_s. Because
  M·k_pol = (|M| + |M_opp|)/2, the routine reading's coefficient is |M|/(|M| + |M_opp|) plus
  the k_s term (M1/M2)·k_s′/k_s; the reduced reading's is −(M1/M2)·k_s′/k_s.
* Type B: thermometer and barometer (through k_TP: 1/(273.2 + T) per °C, −1/P per kPa),
  N_D,w (certificates state k = 2: halved here), k_Q and k_elec (standard uncertainties, %).

The combined standard uncertainty u_c and the expanded U = 2 u_c (k = 2) are reported. The Monte
Carlo cross-check (GUM Supplement 1, JCGM 101:2008) draws every input from a normal distribution
with numpy.random.default_rng(seed) and pushes the draws through the same factor functions.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from chargebook.corrections.air_density import k_TP, k_TP_relative_sensitivity
from chargebook.corrections.conventions import Convention, constants
from chargebook.corrections.polarity import k_pol, k_pol_relative_sensitivity
from chargebook.corrections.recombination import Beam, k_s, k_s_slope

COVERAGE_FACTOR = 2.0


@dataclass(frozen=True)
class Estimate:
    """A value with its standard uncertainty in the same unit (None: not yet estimable)."""

    value: float
    u: float | None


@dataclass(frozen=True)
class Component:
    """One line of the uncertainty budget: its contribution to u_c(y)/y in %, and its source.

    ``u_rel_pct`` is the input's relative standard uncertainty times its sensitivity
    coefficient; None when it cannot be estimated yet or was not given. ``in_charge`` is True
    for components of the corrected charge (all but N_D,w and k_Q).
    """

    component: str
    u_rel_pct: float | None
    source: str
    in_charge: bool = True

    def to_dict(self) -> dict[str, object]:
        """Return the line as JSON-ready plain types."""
        return {"component": self.component, "u_rel_pct": self.u_rel_pct, "source": self.source}


@dataclass(frozen=True)
class RelativeInput:
    """A multiplicative input known by its relative standard uncertainty in % (None: not given)."""

    name: str
    u_rel_pct: float | None
    source: str
    in_charge: bool = True


@dataclass(frozen=True)
class ModelInputs:
    """What the propagation needs: the set means with their standard errors, T, P and the rest.

    ``opposite_nC`` None leaves k_pol out of the model, ``reduced_nC`` or ``voltage_ratio``
    None leaves k_s out, ``temperature_C``/``pressure_kPa`` None leaves k_TP out.
    """

    convention: Convention
    beam: Beam
    routine_nC: Estimate
    opposite_nC: Estimate | None = None
    reduced_nC: Estimate | None = None
    voltage_ratio: float | None = None
    temperature_C: Estimate | None = None
    pressure_kPa: Estimate | None = None
    relative_inputs: tuple[RelativeInput, ...] = field(default_factory=tuple)

    @property
    def has_k_s(self) -> bool:
        return self.reduced_nC is not None and self.voltage_ratio is not None

    @property
    def has_k_TP(self) -> bool:
        return self.temperature_C is not None and self.pressure_kPa is not None


def _times(sensitivity: float, relative_u: float | None) -> float | None:
    return None if relative_u is None else abs(sensitivity) * relative_u


def _relative_u_pct(estimate: Estimate) -> float | None:
    return None if estimate.u is None else 100.0 * estimate.u / abs(estimate.value)


def k_s_log_slope(
    charge_ratio: float, n: float, beam: Beam | str, convention: Convention | str
) -> float:
    """Return (M1/M2)·k_s′/k_s = ∂ln k_s/∂ln(M1/M2), the relative sensitivity of k_s."""
    value = k_s(charge_ratio, n, beam, convention)
    slope = k_s_slope(charge_ratio, n, beam, convention)
    return float(charge_ratio * slope / value)


def _reading_components(model: ModelInputs) -> list[Component]:
    symbols = constants(model.convention).symbols
    routine_c = 1.0
    components = []
    s_ks = 0.0
    if model.has_k_s:
        ratio = model.routine_nC.value / model.reduced_nC.value
        s_ks = k_s_log_slope(ratio, model.voltage_ratio, model.beam, model.convention)
    if model.opposite_nC is not None:
        routine_share, opposite_share = k_pol_relative_sensitivity(
            model.routine_nC.value, model.opposite_nC.value
        )
        routine_c = float(routine_share)
        components.append(
            Component(
                "opposite-polarity readings",
                _times(opposite_share, _relative_u_pct(model.opposite_nC)),
                f"Type A: standard error of the mean, through {symbols['k_pol']}",
            )
        )
    if model.has_k_s:
        components.append(
            Component(
                "reduced-bias readings",
                _times(s_ks, _relative_u_pct(model.reduced_nC)),
                f"Type A: standard error of the mean, through {symbols['k_s']}",
            )
        )
    routine = Component(
        "routine readings",
        _times(routine_c + s_ks, _relative_u_pct(model.routine_nC)),
        "Type A: standard error of the mean, through "
        f"{symbols['M_raw']}, {symbols['k_pol']} and {symbols['k_s']}",
    )
    return [routine, *components]


def _environment_components(model: ModelInputs) -> list[Component]:
    if not model.has_k_TP:
        return []
    symbols = constants(model.convention).symbols
    per_C, per_kPa = k_TP_relative_sensitivity(model.temperature_C.value, model.pressure_kPa.value)
    return [
        Component(
            "temperature",
            100.0 * abs(per_C) * model.temperature_C.u,
            f"Type B: thermometer, u = {model.temperature_C.u:g} °C, through {symbols['k_TP']}",
        ),
        Component(
            "pressure",
            100.0 * abs(per_kPa) * model.pressure_kPa.u,
            f"Type B: barometer, u = {model.pressure_kPa.u:g} kPa, through {symbols['k_TP']}",
        ),
    ]


def budget(model: ModelInputs) -> tuple[Component, ...]:
    """Return the uncertainty budget: one Component per input, contributions in %."""
    relative = [
        Component(item.name, item.u_rel_pct, item.source, item.in_charge)
        for item in model.relative_inputs
    ]
    return tuple(_reading_components(model) + _environment_components(model) + relative)


def combine_pct(components: tuple[Component, ...] | list[Component]) -> float:
    """Return the root-sum-square (%) of the components' contributions that have a value."""
    values = [c.u_rel_pct for c in components if c.u_rel_pct is not None]
    return float(np.sqrt(np.sum(np.square(values)))) if values else 0.0


def _draw(rng: np.random.Generator, estimate: Estimate, trials: int) -> np.ndarray:
    return rng.normal(estimate.value, estimate.u or 0.0, trials)


def monte_carlo_u_pct(
    model: ModelInputs, trials: int = 200_000, seed: int = 398, include_dose: bool = True
) -> float:
    """Return the relative standard uncertainty (%) of the model output by Monte Carlo.

    Every input is drawn from a normal distribution (mean: the estimate; SD: its standard
    uncertainty; inputs with an unknown uncertainty are held fixed) with
    ``numpy.random.default_rng(seed)``; the draws go through the same k_TP, k_pol and k_s
    functions as the analytic value. With ``include_dose`` False, N_D,w and k_Q are held fixed
    (the corrected charge alone).
    """
    rng = np.random.default_rng(seed)
    routine = _draw(rng, model.routine_nC, trials)
    output = np.abs(routine)
    if model.opposite_nC is not None:
        output = output * k_pol(routine, _draw(rng, model.opposite_nC, trials))
    if model.has_k_s:
        reduced = _draw(rng, model.reduced_nC, trials)
        output = output * k_s(routine / reduced, model.voltage_ratio, model.beam, model.convention)
    if model.has_k_TP:
        temperature = _draw(rng, model.temperature_C, trials)
        pressure = _draw(rng, model.pressure_kPa, trials)
        output = output * k_TP(temperature, pressure, model.convention)
    for item in model.relative_inputs:
        if item.u_rel_pct is not None and (include_dose or item.in_charge):
            output = output * rng.normal(1.0, item.u_rel_pct / 100.0, trials)
    return float(100.0 * np.std(output, ddof=1) / np.mean(output))
