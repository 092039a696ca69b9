"""GUM uncertainty of the corrected charge and the dose (JCGM 100:2008), with a Monte Carlo check.

The measurement model is a product, so relative uncertainties add in quadrature, each multiplied
by its relative sensitivity coefficient (∂ln y/∂ln x):

* Type A: the standard error of the mean of each accepted reading set. The routine reading enters
  M_raw, k_pol and k_s; the opposite-polarity reading k_pol; the reduced-bias reading k_s. Because
  M·k_pol = (|M| + |M_opp|)/2, the routine reading's coefficient is |M|/(|M| + |M_opp|) plus
  the k_s term (M1/M2)·k_s′/k_s; the reduced reading's is −(M1/M2)·k_s′/k_s.
* Type B: thermometer and barometer (through k_TP: 1/(273.2 + T) per °C, −1/P per kPa),
  N_D,w (the certificate's expanded uncertainty divided by its coverage factor), k_Q, k_elec and
  the user's own components (standard uncertainties, %).

Each component carries its degrees of freedom: n − 1 for the mean of n readings, ∞ for a
Type B input. The combined standard uncertainty u_c, the effective degrees of freedom ν_eff
(Welch–Satterthwaite, JCGM 100:2008 G.4), the coverage factor k = t_{(1+p)/2}(ν_eff) and the
expanded U = k u_c are reported (see :mod:`chargebook.corrections.student_t`).

The Monte Carlo cross-check (GUM Supplement 1, JCGM 101:2008) draws each Type A mean from a
scaled and shifted t distribution with n − 1 degrees of freedom (JCGM 101 6.4.9) and every
Type B input from a normal distribution, with numpy.random.default_rng(seed), and pushes the
draws through the factor formulas without the input range checks (a draw may leave the range
a measured input must lie in; the formula still has a value). It reports the probabilistically
symmetric coverage interval beside the analytic y ± U and whether the two agree within the
JCGM 101 8.2 numerical tolerance. It never raises: a Monte Carlo that cannot be computed says
why in words.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from chargebook.corrections.air_density import k_TP_relative_sensitivity
from chargebook.corrections.conventions import Convention, constants
from chargebook.corrections.polarity import k_pol_relative_sensitivity
from chargebook.corrections.recombination import Beam, k_s, k_s_slope
from chargebook.corrections.student_t import welch_satterthwaite

#: The coverage factor calibration certificates usually state (k = 2); the default for N_D,w.
CERTIFICATE_COVERAGE_FACTOR = 2.0
#: Monte Carlo draws and seed used by every report (GUM Supplement 1 cross-check).
MONTE_CARLO_TRIALS = 200_000
MONTE_CARLO_SEED = 398
#: Significant digits of u_c that set the JCGM 101:2008 8.2 numerical tolerance: δ = ½·10^l
#: with u_c = c·10^l, c an integer of this many digits (JCGM 101 allows 1 or 2).
VALIDATION_SIGNIFICANT_DIGITS = 1


@dataclass(frozen=True)
class Estimate:
    """A value with its standard uncertainty in the same unit (None: not yet estimable).

    ``dof``: degrees of freedom of ``u``: n − 1 for the mean of n readings (Type A), ∞ for a
    Type B input.
    """

    value: float
    u: float | None
    dof: float = math.inf


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
    #: Degrees of freedom of the contribution: n − 1 (Type A), ∞ (Type B).
    dof: float = math.inf

    def to_dict(self) -> dict[str, object]:
        """Return the line as JSON-ready plain types (``dof`` None for ∞)."""
        return {
            "component": self.component,
            "u_rel_pct": self.u_rel_pct,
            "source": self.source,
            "dof": self.dof if math.isfinite(self.dof) else None,
        }


@dataclass(frozen=True)
class RelativeInput:
    """A multiplicative input known by its relative standard uncertainty in % (None: not given)."""

    name: str
    u_rel_pct: float | None
    source: str
    in_charge: bool = True
    #: Degrees of freedom (∞ for Type B; 1 for a between-set SD estimated from two set means).
    dof: float = math.inf


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
    #: k_s by Boag's theory (the user's choice for a voltage ratio off the table).
    use_boag: bool = False

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
    charge_ratio: float,
    n: float,
    beam: Beam | str,
    convention: Convention | str,
    use_boag: bool = False,
) -> float:
    """Return (M1/M2)·k_s′/k_s = ∂ln k_s/∂ln(M1/M2), the relative sensitivity of k_s."""
    value = k_s(charge_ratio, n, beam, convention, use_boag)
    slope = k_s_slope(charge_ratio, n, beam, convention, use_boag)
    return float(charge_ratio * slope / value)


def _reading_components(model: ModelInputs) -> list[Component]:
    symbols = constants(model.convention).symbols
    routine_c = 1.0
    components = []
    s_ks = 0.0
    if model.has_k_s:
        ratio = model.routine_nC.value / model.reduced_nC.value
        s_ks = k_s_log_slope(
            ratio, model.voltage_ratio, model.beam, model.convention, model.use_boag
        )
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
                dof=model.opposite_nC.dof,
            )
        )
    if model.has_k_s:
        components.append(
            Component(
                "reduced-bias readings",
                _times(s_ks, _relative_u_pct(model.reduced_nC)),
                f"Type A: standard error of the mean, through {symbols['k_s']}",
                dof=model.reduced_nC.dof,
            )
        )
    routine = Component(
        "routine readings",
        _times(routine_c + s_ks, _relative_u_pct(model.routine_nC)),
        "Type A: standard error of the mean, through "
        f"{symbols['M_raw']}, {symbols['k_pol']} and {symbols['k_s']}",
        dof=model.routine_nC.dof,
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
        Component(item.name, item.u_rel_pct, item.source, item.in_charge, item.dof)
        for item in model.relative_inputs
    ]
    return tuple(_reading_components(model) + _environment_components(model) + relative)


def combine_pct(components: tuple[Component, ...] | list[Component]) -> float:
    """Return the root-sum-square (%) of the components' contributions that have a value."""
    values = [c.u_rel_pct for c in components if c.u_rel_pct is not None]
    return float(np.sqrt(np.sum(np.square(values)))) if values else 0.0


def effective_dof(components: tuple[Component, ...] | list[Component]) -> float:
    """Return ν_eff of the components that have a value (Welch–Satterthwaite; ∞ if all Type B)."""
    return welch_satterthwaite((c.u_rel_pct, c.dof) for c in components if c.u_rel_pct is not None)
