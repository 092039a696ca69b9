"""The simulator's physics against published formulas and identities.

- Boag's collection efficiency for pulsed beams f(u) = ln(1 + u)/u (docs/physics.md, Boag's theory):
  f(1) = ln 2 is an identity of the formula.
- Continuous beams: 1/f = 1 + a/V², for which the TRS-398 / TG-51 two-voltage formula
  k_s = (n² − 1)/(n² − M1/M2) is exact (algebra on the published formula).
- Air density: the HPS "Ask the Experts" question 13808 worked example: a reading at 23.5 °C and
  102.0 kPa corrected to 22 °C and 101.325 kPa gives k_TP = 0.99843 (that answer used 273.15).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from chargebook.drivers_generic.simulator.physics import (
    ChamberParameters,
    ChamberPhysics,
    air_density_ratio,
)


def deliver(physics: ChamberPhysics, bias_V: float = 300.0, **kwargs) -> float:
    arguments = {
        "mu_since_change": math.inf,
        "settling_deficit": 0.0,
        "total_mu_before": 0.0,
        "force_spike": False,
        **kwargs,
    }
    return physics.deliver(100.0, bias_V, 20.0, 101.325, **arguments).charge_nC


def test_boag_efficiency_is_ln2_at_u_equal_one():
    physics = ChamberPhysics(ChamberParameters(boag_u_at_reference=1.0), seed=1)
    assert physics.collection_efficiency(300.0) == pytest.approx(math.log(2), rel=1e-15)


def test_continuous_two_voltage_formula_is_exact_for_the_simulated_chamber():
    physics = ChamberPhysics(ChamberParameters(beam="continuous"), seed=1)
    ratio = physics.collection_efficiency(300.0) / physics.collection_efficiency(100.0)
    k_s = (3**2 - 1) / (3**2 - ratio)
    assert k_s == pytest.approx(1 / physics.collection_efficiency(300.0), rel=1e-12)


def test_air_density_matches_the_published_worked_example():
    # HPS Ask the Experts Q13808: 23.5 °C, 102.0 kPa -> 22 °C, 101.325 kPa: 0.99843
    k = air_density_ratio(22.0, 101.325) / air_density_ratio(23.5, 102.0)
    assert k == pytest.approx(0.99843, abs=5e-6)


def test_defaults_look_like_a_0_6_cc_chamber_at_300_V():
    # common practice: ~20 nC per 100 MU, k_pol ~1.002, k_s 1.005-1.01 for a pulsed beam
    truth = ChamberPhysics(ChamberParameters(), seed=1).truth(20.0, 101.325, 300.0)
    assert 19.0 < 100 * truth["sensitivity_nC_per_MU"] < 21.0
    assert 1.001 < truth["k_pol"] < 1.003
    assert 1.005 < truth["k_s"] < 1.01
    assert truth["k_TP"] == pytest.approx(1.0, abs=1e-12)
    assert truth["k_h"] == truth["k_elec"] == 1.0  # neither is modelled: stated as exactly 1


def test_same_seed_same_deliveries_and_different_seed_different_noise():
    first = [deliver(ChamberPhysics(ChamberParameters(), seed=4)) for _ in range(1)]
    a, b, c = (ChamberPhysics(ChamberParameters(), seed=s) for s in (4, 4, 5))
    series_a = [deliver(a) for _ in range(20)]
    series_b = [deliver(b) for _ in range(20)]
    series_c = [deliver(c) for _ in range(20)]
    assert series_a == series_b
    assert series_a[0] == first[0]
    assert series_a != series_c
    relative_sd = np.std(series_a) / np.mean(series_a)
    assert 0.0001 < relative_sd < 0.0006  # 0.03 % noise, sampled 20 times


def test_negative_bias_gives_negative_charge_with_the_polarity_effect():
    physics = ChamberPhysics(ChamberParameters(noise_relative=0.0, spike_probability=0), seed=1)
    plus, minus = deliver(physics, 300.0), deliver(physics, -300.0)
    assert minus < 0 < plus
    k_pol = (abs(plus) + abs(minus)) / (2 * abs(plus))  # IAEA TRS-398
    assert k_pol == pytest.approx(physics.truth(20, 101.325, 300)["k_pol"], rel=1e-12)


def test_a_forced_spike_and_settling_lower_or_raise_the_reading():
    quiet = ChamberParameters(noise_relative=0.0, spike_probability=0.0)
    settled = deliver(ChamberPhysics(quiet, seed=1))
    spiked = deliver(ChamberPhysics(quiet, seed=1), force_spike=True)
    unsettled = deliver(ChamberPhysics(quiet, seed=1), mu_since_change=0.0, settling_deficit=0.004)
    assert 1.005 <= spiked / settled <= 1.02
    assert unsettled / settled == pytest.approx(1 - 0.004, rel=1e-12)


def test_an_unknown_beam_kind_is_refused_by_name():
    with pytest.raises(ValueError, match="beam"):
        ChamberParameters(beam="scanned-proton")
