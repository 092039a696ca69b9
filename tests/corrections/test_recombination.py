"""k_s by the two-voltage method: table identities, Boag's theory, TG-51, continuous beams."""

from __future__ import annotations

import numpy as np
import pytest
from chargebook.corrections.errors import InputError
from chargebook.corrections.recombination import (
    PULSED_COEFFICIENTS,
    PULSED_SCANNED_COEFFICIENTS,
    RATIO_RESOLUTION,
    P_ion_linear,
    boag_efficiency,
    boag_u,
    k_s,
    k_s_boag,
    k_s_continuous,
    k_s_slope,
    k_s_tabulated,
    k_s_unchecked,
    method,
    ratio_resolution,
    tabulated_row,
    voltage_ratio,
)
from hypothesis import given
from hypothesis import strategies as st

TABLES = {"pulsed": PULSED_COEFFICIENTS, "pulsed-scanned": PULSED_SCANNED_COEFFICIENTS}


def test_table_has_the_tabulated_ratios() -> None:
    # TRS-398 two-voltage table rows n = 2, 2.5, 3, 3.5, 4, 5 (from memory, docs/physics.md).
    for table in TABLES.values():
        assert list(table) == [2.0, 2.5, 3.0, 3.5, 4.0, 5.0]


@pytest.mark.parametrize("beam", list(TABLES))
@pytest.mark.parametrize("n", [2.0, 2.5, 3.0, 3.5, 4.0, 5.0])
def test_no_correction_when_both_readings_agree(beam: str, n: float) -> None:
    # Identity: M1 = M2 means complete collection, k_s = 1; each row sums to about 1
    # (docs/physics.md): pulsed rows to within 0.001, pulsed-scanned within 0.003.
    tolerance = 0.001 if beam == "pulsed" else 0.003
    assert k_s_tabulated(1.0, n, beam) == pytest.approx(1.0, abs=tolerance + 1e-12)
    assert sum(TABLES[beam][n]) == pytest.approx(1.0, abs=tolerance + 1e-12)


@pytest.mark.parametrize("n", [2.0, 2.5, 3.0, 3.5, 4.0, 5.0])
def test_boag_theory_agrees_with_the_pulsed_table(n: float) -> None:
    # docs/physics.md: the pulsed quadratics are fits to Boag's theory, agreement within about
    # 0.1 % for k_s <= 1.05 (the 0.1 % is reached at k_s = 1 by rows summing to 1.001).
    u = np.linspace(0.0, 0.2, 2001)  # Boag's u at the routine bias; 1/f(0.2) ≈ 1.097
    theory = 1.0 / boag_efficiency(u)
    covered = theory <= 1.05
    ratios = boag_efficiency(u[covered]) / boag_efficiency(n * u[covered])
    table = k_s_tabulated(ratios, n, "pulsed")
    assert np.max(np.abs(table / theory[covered] - 1.0)) <= 0.001 + 1e-9
    # ... and the numerical solution from the charge ratio gives the theory back.
    assert k_s_boag(ratios, n) == pytest.approx(theory[covered], rel=1e-9)


def test_boag_efficiency_limits() -> None:
    # f(u) = ln(1 + u)/u → 1 as u → 0 (Boag); f(1) = ln 2 (arithmetic).
    assert boag_efficiency(0.0) == 1.0
    assert boag_efficiency(1.0) == pytest.approx(np.log(2.0), rel=1e-15)
    assert boag_efficiency(1e-9) == pytest.approx(1.0 - 5e-10, rel=1e-15)


@given(st.floats(1e-4, 5.0), st.sampled_from([2.0, 2.5, 3.0, 4.0, 5.0]))
def test_boag_solution_reproduces_the_charge_ratio(u: float, n: float) -> None:
    # Round trip through the theory: M1/M2 = f(u)/f(n·u) must give back u.
    ratio = boag_efficiency(u) / boag_efficiency(n * u)
    if ratio > 2.0:
        return
    assert boag_u(ratio, n) == pytest.approx(u, rel=1e-9)


def test_boag_is_vectorised() -> None:
    ratios = np.array([1.0, 1.01, 1.03])
    assert k_s_boag(ratios, 3.0) == pytest.approx([k_s_boag(r, 3.0) for r in ratios], rel=1e-12)
    assert k_s_boag(1.0, 3.0) == pytest.approx(1.0, abs=1e-12)


def test_tg51_linear_form() -> None:
    # TG-51: P_ion = (1 − n)/(M1/M2 − n); by hand for n = 2, M1/M2 = 1.01: 1/0.99.
    assert P_ion_linear(1.01, 2.0) == pytest.approx(1.0 / 0.99, rel=1e-15)
    assert P_ion_linear(1.0, 3.0) == 1.0


def test_tg51_and_table_are_close_near_unity() -> None:
    # docs/physics.md: near k_s = 1 the table and the linear form differ by up to about 0.1 %
    # at n = 2.5, 3.5, 5; a loose cross-check of two published forms.
    for n in (2.0, 3.0, 4.0):
        assert k_s_tabulated(1.01, n) == pytest.approx(P_ion_linear(1.01, n), abs=0.002)


def test_continuous_formula() -> None:
    # Both protocols, continuous beams: (n² − 1)/(n² − M1/M2); by hand n = 2, M1/M2 = 1.01:
    # 3/2.99.
    assert k_s_continuous(1.01, 2.0) == pytest.approx(3.0 / 2.99, rel=1e-15)
    assert k_s(1.0, 3.0, "continuous", "tg51") == 1.0


def test_dispatch_follows_protocol_and_beam() -> None:
    assert k_s(1.01, 3.0, "pulsed", "trs398") == k_s_tabulated(1.01, 3.0, "pulsed")
    assert k_s(1.01, 3.0, "pulsed-scanned", "trs398") == k_s_tabulated(1.01, 3.0, "pulsed-scanned")
    assert k_s(1.01, 3.0, "pulsed", "tg51") == P_ion_linear(1.01, 3.0)
    assert k_s(1.01, 3.0, "continuous", "trs398") == k_s_continuous(1.01, 3.0)


@pytest.mark.parametrize("beam", ["pulsed", "pulsed-scanned", "continuous"])
@pytest.mark.parametrize("convention", ["trs398", "tg51"])
def test_slope_is_the_derivative(beam: str, convention: str) -> None:
    # Central difference of the function itself checks the analytic derivative.
    step = 1e-6
    numeric = (
        k_s(1.02 + step, 3.0, beam, convention) - k_s(1.02 - step, 3.0, beam, convention)
    ) / (2 * step)
    assert k_s_slope(1.02, 3.0, beam, convention) == pytest.approx(numeric, rel=1e-6)


def test_voltage_ratio_accepts_magnitude_or_signed_reduced_bias() -> None:
    assert voltage_ratio(300.0, 100.0) == 3.0
    assert voltage_ratio(-300.0, 100.0) == 3.0
    assert voltage_ratio(-300.0, -100.0) == 3.0


@pytest.mark.parametrize(
    ("routine", "reduced", "field"),
    [
        (300.0, -100.0, "reduced_V"),
        (300.0, 200.0, "voltage ratio routine_V/reduced_V"),
        (1300.0, 300.0, "|routine_V|"),
        (300.0, 5.0, "|reduced_V|"),
        ("300 V", 100.0, "routine_V"),
    ],
)
def test_bad_biases_are_refused(routine: object, reduced: object, field: str) -> None:
    with pytest.raises(InputError) as caught:
        voltage_ratio(routine, reduced)
    assert caught.value.field == field


def test_a_ratio_not_in_the_table_is_refused_not_interpolated() -> None:
    with pytest.raises(InputError) as caught:
        k_s_tabulated(1.01, 300.0 / 130.0, "pulsed")
    message = str(caught.value)
    assert "2.30769 is not a tabulated voltage ratio" in message
    assert "2, 2.5, 3, 3.5, 4, 5" in message


def test_a_ratio_near_a_row_is_refused_not_rounded_to_it() -> None:
    # Issue 12 item 3: n = 1.98 silently took the n = 2 row (−0.11 % at k_s = 1.05). The rows
    # are TRS-398 (2000)'s (from memory); 198 V / 100 V is 1.98, not 2, to any setting resolution.
    with pytest.raises(InputError, match=r"1\.98 is not a tabulated voltage ratio"):
        k_s_tabulated(1.03, 198.0 / 100.0)
    # 400 V / 133 V = 3.0075 is not 3 to the default resolution of 0.001 in n either.
    with pytest.raises(InputError, match="not a tabulated voltage ratio"):
        k_s_tabulated(1.01, 400.0 / 133.0)


def test_a_ratio_within_the_bias_resolution_of_a_row_uses_that_row() -> None:
    # With 1 V bias steps, 400 V and 133 V are each within 0.5 V of their nominal values, so
    # n = 3.0075 is known only to ±3.0075·0.5·(1/400 + 1/133) = ±0.0151: that is 3.
    resolution = ratio_resolution(400.0, 133.0, bias_resolution_V=1.0)
    assert resolution == pytest.approx(3.0075 * 0.5 * (1 / 400 + 1 / 133), rel=1e-3)
    assert tabulated_row(400.0 / 133.0, "pulsed", resolution) == 3.0
    assert tabulated_row(400.0 / 133.0, "pulsed") is None
    assert ratio_resolution(300.0, 100.0) == RATIO_RESOLUTION


def test_boag_by_choice_gives_the_theory_the_table_was_fitted_to() -> None:
    # Boag's theory is what the TRS-398 (2000) quadratics were fitted to (agreement within about
    # 0.1 % for k_s up to 1.05, from memory): at n = 3 the chosen method agrees with the row.
    assert k_s(1.02, 3.0, "pulsed", "trs398", use_boag=True) == pytest.approx(
        k_s(1.02, 3.0, "pulsed", "trs398"), abs=1e-3
    )
    assert "Boag" in method("pulsed", "trs398", use_boag=True)
    # The slope by central difference agrees with the slope of the value itself.
    step = 1e-5
    numeric = (k_s_boag(1.02 + step, 2.7) - k_s_boag(1.02 - step, 2.7)) / (2 * step)
    assert k_s_slope(1.02, 2.7, "pulsed", "trs398", use_boag=True) == pytest.approx(
        numeric, rel=1e-4
    )


def test_unchecked_k_s_gives_nan_or_inf_for_draws_off_the_formula_never_an_error() -> None:
    # Monte Carlo draws may cross the range a measured ratio must lie in (issue 12 item 5).
    values = k_s_unchecked(np.array([1.01, 3.0, 0.5]), 3.0, "pulsed", "tg51")
    assert values[0] == pytest.approx(P_ion_linear(1.01, 3.0))
    assert not np.isfinite(values[1])
    assert np.isfinite(values[2])


def test_continuous_beams_have_no_table() -> None:
    with pytest.raises(InputError, match="beam"):
        k_s_tabulated(1.01, 3.0, "continuous")


@pytest.mark.parametrize("ratio", [0.5, 2.5, "1.01"])
def test_implausible_charge_ratio_is_refused(ratio: object) -> None:
    with pytest.raises(InputError, match="charge ratio M1/M2"):
        k_s(ratio, 3.0)


def test_charge_ratio_must_stay_below_n() -> None:
    with pytest.raises(InputError, match="below the voltage ratio"):
        P_ion_linear(2.0, 2.0)
