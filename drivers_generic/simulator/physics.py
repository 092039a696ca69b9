"""The simulated chamber's physics: what charge a beam delivery produces, and the true factors.

This is the simulator's OWN implementation, written apart from ``chargebook.corrections`` on
purpose: closed-loop tests read this chamber through a driver, correct the readings with the
correction code, and compare with :meth:`ChamberPhysics.truth`, so the two must not share code.

The model, for a delivery of N monitor units at bias V (signed) and air temperature T, pressure P:

    Q = N · S · (ρ/ρ0) · f(V) · p(sign V) · s(MU since change) · d(total MU) · (1 + ε) (+ spike)

- S: sensitivity in nC/MU at full collection, reference air density, positive polarity.
- ρ/ρ0 = ((273.15 + T0)/(273.15 + T)) · (P/P0): the air in the cavity, so that the textbook
  k_TP = ((273.15 + T)/(273.15 + T0)) · (P0/P) recovers it (T0 = 20 °C, P0 = 101.325 kPa).
- f(V): collection efficiency. Pulsed beams: Boag, f = ln(1 + u)/u with u = u_ref · V_ref/|V|.
  Continuous beams: general recombination, 1/f = 1 + a/V² (so the two-voltage formula
  k_s = (n² − 1)/(n² − M1/M2) is exact for this model).
- p(±): polarity effect, |M+| = (1 + h)·Q, |M−| = (1 − h)·Q, so the textbook
  k_pol = (|M+| + |M−|)/(2|M+|) = 1/(1 + h) at positive routine polarity.
- s: settling after a polarity or bias change, 1 − s0·exp(−MU/τ), counted in MU delivered since
  the change (pre-irradiation), not in time.
- d: slow drift, linear in the total MU delivered.
- ε: Gaussian noise, relative; a spike is an extra relative excess on a rare delivery.

Determinism: every random number is drawn per delivery, always the same count and in the same
order, from ``numpy.random.default_rng(seed)``. A reading therefore depends on the seed and the
sequence of deliveries and bias changes only, never on wall-clock timing. Leakage (a constant
current integrated over simulated time) is the one time-dependent term; at 1e-5 nC/s against
~20 nC per reading a timing difference of a second moves a reading by 5e-7 relative.

The charge sign follows the bias sign.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np

KELVIN_OFFSET = 273.15
REFERENCE_TEMPERATURE_C = 20.0
REFERENCE_PRESSURE_kPa = 101.325
BEAM_KINDS = ("pulsed", "continuous")


@dataclass(frozen=True, slots=True)
class ChamberParameters:
    """The true properties of the simulated chamber, beam and electrometer (units in names)."""

    sensitivity_nC_per_MU: float = 0.2  # 0.6 cc thimble chamber, ~20 nC per 100 MU
    beam: str = "pulsed"
    reference_bias_V: float = 300.0
    boag_u_at_reference: float = 0.0159  # pulsed: k_s ≈ 1.008 at 300 V, ≈ 1.024 at 100 V
    continuous_a_V2: float = 180.0  # continuous: k_s = 1 + a/V² ≈ 1.002 at 300 V
    polarity_h: float = -0.002  # |M+| = 0.998 Q: k_pol ≈ 1.002 at positive routine polarity
    settling_polarity: float = 0.004  # relative deficit right after a polarity change
    settling_bias: float = 0.0015  # relative deficit right after a bias magnitude change
    settling_tau_MU: float = 40.0
    drift_per_kMU: float = 2e-5
    noise_relative: float = 0.0003
    spike_probability: float = 0.002
    spike_relative_min: float = 0.005
    spike_relative_max: float = 0.02
    leakage_nC_per_s: float = 1e-5

    def __post_init__(self) -> None:
        if self.beam not in BEAM_KINDS:
            raise ValueError(f"beam = {self.beam!r} is not allowed; allowed: {BEAM_KINDS}")


@dataclass(frozen=True, slots=True)
class Delivery:
    """One beam delivery's charge (nC, signed) and the random draws it used."""

    charge_nC: float
    noise_relative: float
    spike_relative: float
    settling_factor: float


def air_density_ratio(temperature_C: float, pressure_kPa: float) -> float:
    """Return ρ/ρ0, the cavity air density relative to 20 °C and 101.325 kPa."""
    return ((KELVIN_OFFSET + REFERENCE_TEMPERATURE_C) / (KELVIN_OFFSET + temperature_C)) * (
        pressure_kPa / REFERENCE_PRESSURE_kPa
    )


class ChamberPhysics:
    """The seeded chamber: computes each delivery's charge and reports the true factors."""

    def __init__(self, parameters: ChamberParameters, seed: int) -> None:
        self.parameters = parameters
        self.seed = seed
        self._rng = np.random.default_rng(seed)

    def collection_efficiency(self, bias_V: float) -> float:
        """Return f(V), the fraction of the ions collected at bias ``bias_V`` (volts, signed)."""
        p = self.parameters
        volts = abs(bias_V)
        if volts <= 0:
            return 0.0
        if p.beam == "pulsed":
            u = p.boag_u_at_reference * p.reference_bias_V / volts
            return math.log1p(u) / u
        return 1.0 / (1.0 + p.continuous_a_V2 / volts**2)

    def polarity_factor(self, bias_V: float) -> float:
        """Return |M(±)| / Q: 1 + h at positive bias, 1 − h at negative bias."""
        h = self.parameters.polarity_h
        return 1.0 + h if bias_V >= 0 else 1.0 - h

    def settling_factor(self, mu_since_change: float, deficit: float) -> float:
        """Return the response factor ``mu_since_change`` MU after a change of size ``deficit``."""
        return 1.0 - deficit * math.exp(-mu_since_change / self.parameters.settling_tau_MU)

    def deliver(
        self,
        mu: float,
        bias_V: float,
        temperature_C: float,
        pressure_kPa: float,
        *,
        mu_since_change: float,
        settling_deficit: float,
        total_mu_before: float,
        force_spike: bool,
    ) -> Delivery:
        """Return the charge collected from a delivery of ``mu`` MU (three draws, in order)."""
        p = self.parameters
        noise = float(self._rng.normal(0.0, p.noise_relative))
        spike_draw = float(self._rng.random())
        spike_size = float(self._rng.uniform(p.spike_relative_min, p.spike_relative_max))
        spike = spike_size if (force_spike or spike_draw < p.spike_probability) else 0.0
        settling = self.settling_factor(mu_since_change, settling_deficit)
        drift = 1.0 + p.drift_per_kMU * total_mu_before / 1000.0
        magnitude = (
            mu
            * p.sensitivity_nC_per_MU
            * air_density_ratio(temperature_C, pressure_kPa)
            * self.collection_efficiency(bias_V)
            * self.polarity_factor(bias_V)
            * settling
            * drift
            * (1.0 + noise + spike)
        )
        sign = 1.0 if bias_V >= 0 else -1.0
        return Delivery(sign * magnitude, noise, spike, settling)

    def truth(
        self,
        temperature_C: float,
        pressure_kPa: float,
        bias_V: float,
        biases_V: list[float] | None = None,
    ) -> dict[str, object]:
        """Return the true factors: k_TP, k_pol, k_s (at each bias), k_h, k_elec, sensitivity,
        leakage. k_pol is for the routine polarity of ``reference_bias_V`` (positive)."""
        p = self.parameters
        routine = p.reference_bias_V
        wanted = sorted(
            {routine, routine / 2, routine / 3, routine / 4, abs(bias_V), *(biases_V or [])},
            reverse=True,
        )
        k_s_by_bias = {_key(v): 1.0 / self.collection_efficiency(v) for v in wanted if v > 0}
        plus, minus = self.polarity_factor(1.0), self.polarity_factor(-1.0)
        return {
            "k_TP": 1.0 / air_density_ratio(temperature_C, pressure_kPa),
            "k_TP_reference": {
                "temperature_C": REFERENCE_TEMPERATURE_C,
                "pressure_kPa": REFERENCE_PRESSURE_kPa,
            },
            "k_pol": (plus + minus) / (2 * plus),
            "k_pol_by_routine_polarity": {
                "+": (plus + minus) / (2 * plus),
                "-": (plus + minus) / (2 * minus),
            },
            "k_s": 1.0 / self.collection_efficiency(routine),
            "k_h": 1.0,  # humidity is not modelled: the simulated air is always at reference
            "k_elec": 1.0,  # the simulated electrometer reads charge without calibration error
            "k_s_by_bias_V": k_s_by_bias,
            "routine_bias_V": routine,
            "bias_V": bias_V,
            "beam": p.beam,
            "temperature_C": temperature_C,
            "pressure_kPa": pressure_kPa,
            "sensitivity_nC_per_MU": p.sensitivity_nC_per_MU,
            "leakage_nC_per_s": p.leakage_nC_per_s,
            "noise_relative": p.noise_relative,
            "seed": self.seed,
            "parameters": asdict(p),
        }


def _key(bias_V: float) -> str:
    """Return a bias as a JSON object key: '300', '150', '62.5'."""
    return f"{bias_V:g}"
