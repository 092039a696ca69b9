"""The closed loop: a simulated chamber with known k_pol, k_s and air density, read through the
driver over a real pty, corrected with the textbook formulas written out here, recovers the
simulator's truth within the noise.

The formulas are written in this file on purpose (not imported from chargebook.corrections, and
not from the simulator), so three implementations meet: the simulator's physics, these
textbook lines, and (elsewhere) the correction library.

- k_TP = ((273.2 + T)/(273.2 + T0)) · (P0/P), T0 = 20 °C, P0 = 101.325 kPa (IAEA TRS-398).
- k_pol = (|M+| + |M−|) / (2|M|), M at the routine polarity (IAEA TRS-398).
- pulsed beams, Boag: f(u) = ln(1 + u)/u; solve f(u)/f(n·u) = M1/M2 for u, k_s = 1/f(u)
  (Boag's theory, as summarised in docs/physics.md).
- pulsed beams, TRS-398 two-voltage quadratic for n = 3: k_s = 1.198 − 0.875·r + 0.677·r²,
  r = M1/M2 (coefficients from memory; the table is a fit to Boag within about 0.1 %).
- continuous beams: k_s = (n² − 1)/(n² − M1/M2) (IAEA TRS-398; AAPM TG-51).

Noise: 0.03 % per reading in the simulator; each mean is of 5 readings (standard error about
0.013 %), so factors are compared within 0.06 % and the corrected charge within 0.1 %.
"""

from __future__ import annotations

import math
import statistics

import pytest
from chargebook.drivers_generic import open_electrometer
from chargebook.drivers_generic.interface import Capability

from .conftest import FAST, MU, capture

ROUTINE_V = 300.0
REDUCED_V = 100.0
N_RATIO = ROUTINE_V / REDUCED_V
READINGS = 5
WARMUP = 3  # readings after each bias change, discarded while the chamber settles
FACTOR_BOUND = 6e-4
CHARGE_BOUND = 1e-3


def k_TP(temperature_C: float, pressure_kPa: float) -> float:
    return ((273.2 + temperature_C) / (273.2 + 20.0)) * (101.325 / pressure_kPa)


def k_pol(m_plus: float, m_minus: float) -> float:
    return (abs(m_plus) + abs(m_minus)) / (2 * abs(m_plus))


def boag_f(u: float) -> float:
    return math.log1p(u) / u


def k_s_boag(ratio: float, n: float) -> float:
    """Solve f(u)/f(n·u) = ratio for u by bisection; return 1/f(u)."""
    low, high = 1e-9, 10.0
    for _ in range(200):
        middle = (low + high) / 2
        if boag_f(middle) / boag_f(n * middle) < ratio:
            low = middle
        else:
            high = middle
    return 1.0 / boag_f((low + high) / 2)


def k_s_trs398_pulsed_n3(ratio: float) -> float:
    return 1.198 - 0.875 * ratio + 0.677 * ratio**2


def k_s_continuous(ratio: float, n: float) -> float:
    return (n**2 - 1) / (n**2 - ratio)


def mean_after_change(driver, control, volts: float) -> float:
    """Set the bias (remotely, or 'by hand' through the bench), settle, return the mean in nC."""
    if Capability.SET_BIAS in driver.capabilities:
        driver.set_bias(volts)
    else:
        control.bias(volts)
    for _ in range(WARMUP):
        capture(driver, control)
    return statistics.fmean(capture(driver, control).charge_nC for _ in range(READINGS))


def measure(sim, profile: str) -> dict[str, float]:
    driver = open_electrometer(profile, port=sim.serial)
    try:
        m_plus = mean_after_change(driver, sim.control, ROUTINE_V)
        m_minus = mean_after_change(driver, sim.control, -ROUTINE_V)
        mean_after_change(driver, sim.control, ROUTINE_V)  # back, so the bias change settles
        m_reduced = mean_after_change(driver, sim.control, REDUCED_V)
    finally:
        driver.close()
    return {"M+": m_plus, "M-": m_minus, "M2": m_reduced}


def test_pulsed_beam_corrections_recover_the_true_factors(simulator):
    sim = simulator(
        "--serial", "--profile", "query-plain", "--seed", "7", "--beam", "pulsed",
        "--temperature-C", "24.0", "--pressure-kPa", "98.5", *FAST,
    )  # fmt: skip
    m = measure(sim, "query-plain")
    truth = sim.control.truth(biases_V=[ROUTINE_V, REDUCED_V])
    environment = sim.control.environment()
    ratio = m["M+"] / m["M2"]

    measured_k_TP = k_TP(environment["temperature_C"], environment["pressure_kPa"])
    measured_k_pol = k_pol(m["M+"], m["M-"])
    measured_k_s = k_s_boag(ratio, N_RATIO)

    assert measured_k_TP == pytest.approx(truth["k_TP"], rel=1e-5)  # 273.2 vs 273.15 K
    assert measured_k_pol == pytest.approx(truth["k_pol"], abs=FACTOR_BOUND)
    assert measured_k_s == pytest.approx(truth["k_s_by_bias_V"]["300"], abs=FACTOR_BOUND)
    assert k_s_trs398_pulsed_n3(ratio) == pytest.approx(measured_k_s, abs=1e-3)
    # the chamber's signal at reference conditions, full collection, polarity-averaged
    corrected = m["M+"] * measured_k_TP * measured_k_pol * measured_k_s
    assert corrected == pytest.approx(MU * truth["sensitivity_nC_per_MU"], rel=CHARGE_BOUND)
    # and the corrections were not trivial: each moved the reading by more than the noise
    assert abs(measured_k_TP - 1) > 0.03
    assert measured_k_pol - 1 > 0.001
    assert measured_k_s - 1 > 0.005


def test_continuous_beam_corrections_recover_the_true_factors_without_remote_bias(simulator):
    # push-exponent has no SET_BIAS: every bias change goes through the bench, as by hand.
    sim = simulator(
        "--serial", "--profile", "push-exponent", "--seed", "3", "--beam", "continuous", *FAST
    )  # fmt: skip
    m = measure(sim, "push-exponent")
    truth = sim.control.truth(biases_V=[ROUTINE_V, REDUCED_V])
    ratio = m["M+"] / m["M2"]

    measured_k_pol = k_pol(m["M+"], m["M-"])
    measured_k_s = k_s_continuous(ratio, N_RATIO)

    assert measured_k_pol == pytest.approx(truth["k_pol"], abs=FACTOR_BOUND)
    assert measured_k_s == pytest.approx(truth["k_s"], abs=FACTOR_BOUND)
    environment = sim.control.environment()
    corrected = (
        m["M+"]
        * k_TP(environment["temperature_C"], environment["pressure_kPa"])
        * measured_k_pol
        * measured_k_s
    )
    assert corrected == pytest.approx(MU * truth["sensitivity_nC_per_MU"], rel=CHARGE_BOUND)
