"""Issue 12: results that cannot be silently wrong, checked against sources outside the project.

The readings are invented inputs; the check values come from JCGM 100:2008 (Table G.2), an
independent GUM implementation (GTC, the GUM Tree Calculator, a test-only dependency), TRS-398
(2000) and common practice, named beside each check.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable

import pytest
from chargebook.corrections.errors import InputError
from chargebook.corrections.evaluate import MeasurementInputs, Uncertainties, evaluate
from chargebook.corrections.monte_carlo import validation_tolerance_pct
from chargebook.corrections.recombination import k_s_tabulated
from chargebook.corrections.set_air import SetEnvironment
from chargebook.corrections.stability import Thresholds
from chargebook.corrections.statistics import set_statistics
from chargebook.corrections.student_t import coverage_factor, welch_satterthwaite
from chargebook.corrections.units import KPA_PER_MMHG
from GTC import reporting, ureal

Session = Callable[..., MeasurementInputs]


def codes(result: object) -> set[str]:
    return {flag.code for flag in result.flags}


# ------------------------------------------------------------------ item 6: ν_eff and k


@pytest.mark.parametrize(
    ("dof", "k"),
    # JCGM 100:2008 Table G.2, t_p(ν) for p = 95.45 % and 95 %: ν = 5 → 2.57, 10 → 2.23, ∞ → 1.96.
    [(5, 2.57), (10, 2.23), (20, 2.09), (math.inf, 1.96)],
)
def test_coverage_factor_matches_the_gum_t_table(dof: float, k: float) -> None:
    assert coverage_factor(dof, 0.95) == pytest.approx(k, abs=0.005)


@pytest.mark.parametrize("dof", [1, 2, 3, 4.5, 5.8, 7, 12, 30, 100, 1000])
@pytest.mark.parametrize("p", [0.6827, 0.90, 0.95, 0.99])
def test_coverage_factor_agrees_with_gtc(dof: float, p: float) -> None:
    # GTC's k_factor (the GUM Tree Calculator), an independent implementation of t_p(ν).
    assert coverage_factor(dof, p) == pytest.approx(reporting.k_factor(dof, 100 * p), rel=1e-8)


def test_welch_satterthwaite_agrees_with_gtc() -> None:
    a, b, c = ureal(1.0, 0.003, 2), ureal(1.0, 0.002, 4), ureal(1.0, 0.004)
    y = a * b * c
    ours = welch_satterthwaite([(0.003, 2), (0.002, 4), (0.004, math.inf)])
    assert ours == pytest.approx(y.df, rel=1e-6)


def test_type_a_dominant_session_gets_k_from_student_t_not_2(session: Session) -> None:
    # Issue 12 item 6: 3 readings per set at about 0.3 % RSD with Type A dominant; the issue's
    # worked case gives ν_eff ≈ 5.8 and k ≈ 2.46 at 95 %. The oracle here is GTC: the same
    # measurement model built from ureals (each mean with its standard error and n − 1 degrees
    # of freedom), whose Welch–Satterthwaite ν_eff and k_factor are GTC's own.
    routine = (20.00, 20.06, 19.94)
    opposite = (-20.04, -20.10, -19.98)
    reduced = (19.80, 19.86, 19.74)
    inputs = session(
        routine_nC=routine,
        opposite_nC=opposite,
        reduced_nC=reduced,
        uncertainties=Uncertainties(u_N_Dw_pct_k2=0.2, u_k_Q_pct=0.05),
    )
    result = evaluate(inputs)

    def mean(values: tuple[float, ...]) -> ureal:
        stats = set_statistics(values)
        return ureal(abs(stats.mean_nC), stats.standard_error_nC, len(values) - 1)

    M, M_opp, M_2 = mean(routine), mean(opposite), mean(reduced)
    a0, a1, a2 = 1.198, -0.875, 0.677  # TRS-398 (2000) pulsed, n = 3 (from memory)
    r = M / M_2
    y = (M + M_opp) / 2 * (a0 + a1 * r + a2 * r * r)
    y = y * ureal(1.0, 0.001) * ureal(1.0, 0.0005)  # N_D,w (0.2 % / 2) and k_Q
    T = ureal(21.8, 0.1)
    P = ureal(100.6, 0.05)
    y = y * (273.2 + T) / (273.2 + 20.0) * (101.325 / P)
    assert result.u_combined_pct == pytest.approx(100 * y.u / y.x, rel=1e-3)
    assert result.effective_dof == pytest.approx(y.df, rel=1e-3)
    assert result.coverage_factor == pytest.approx(reporting.k_factor(y.df), rel=1e-3)
    assert result.coverage_factor > 2.2  # well above the fixed k = 2 of old
    assert result.U_expanded_pct == pytest.approx(result.coverage_factor * result.u_combined_pct)
    document = result.to_dict()
    assert document["effective_dof"] == pytest.approx(result.effective_dof)
    assert document["coverage_factor"] == result.coverage_factor
    assert document["coverage_probability"] == 0.95


def test_coverage_probability_is_a_setting(session: Session) -> None:
    result = evaluate(session(uncertainties=Uncertainties(1.1, 1.0, coverage_probability=0.99)))
    # Type B dominant: ν_eff is large and k tends to the normal 2.576 for 99 % (JCGM 100 G.2).
    assert result.coverage_factor == pytest.approx(2.576, abs=0.02)
    with pytest.raises(InputError, match="coverage_probability"):
        evaluate(session(uncertainties=Uncertainties(coverage_probability=1.5)))


def test_certificate_coverage_factor_is_enterable(session: Session) -> None:
    # Item 8: a certificate stating U = 1.1 % at k = 2.2 gives u = 0.5 % (JCGM 100 6.2.1).
    result = evaluate(session(uncertainties=Uncertainties(1.1, 1.0, k_N_Dw=2.2)))
    assert result.factors["N_Dw"].u_rel_pct == pytest.approx(0.5)
    assert "k = 2.2" in next(c.source for c in result.budget if "N" in c.component[:2])


def test_user_components_enter_the_budget(session: Session) -> None:
    plain = evaluate(session())
    more = evaluate(
        session(
            uncertainties=Uncertainties(
                1.1,
                1.0,
                u_reference_conditions_pct=0.3,
                u_long_term_stability_pct=0.3,
                u_beam_monitor_pct=0.2,
                u_electrometer_resolution_pct=0.05,
            )
        )
    )
    names = [c.component for c in more.budget]
    assert "establishment of reference conditions" in names
    assert "electrometer resolution" in names
    # Root-sum-square (JCGM 100 equation 10 for a product model in relative terms).
    extra = 0.3**2 + 0.3**2 + 0.2**2 + 0.05**2
    assert more.u_combined_pct == pytest.approx(math.sqrt(plain.u_combined_pct**2 + extra))


# ------------------------------------------------------------------ items 5 and 7: Monte Carlo


@pytest.mark.parametrize(
    "changes",
    [
        # Issue 12 item 5: T = 10.0 °C exactly (allowed) and the thermometer at its limit.
        {"temperature_C": 10.0},
        {"temperature_C": 10.0, "uncertainties": Uncertainties(1.1, 1.0, u_temperature_C=5.0)},
        {"pressure_kPa": 60.0},
        # A routine set of three readings with about 3 % RSD.
        {"routine_nC": (14.30, 14.75, 15.20)},
        # A scattered opposite-polarity set.
        {"opposite_nC": (-14.2, -15.3, -14.8)},
    ],
)
def test_monte_carlo_never_raises(session: Session, changes: dict[str, object]) -> None:
    check = evaluate(session(**changes)).monte_carlo(trials=50_000, seed=5)
    assert check.note  # computed or not, it says so in words
    if check.computed:
        low, high = check.interval_pct
        assert low < 0 < high


def test_monte_carlo_agrees_with_the_analytic_interval_for_a_sound_session(
    session: Session,
) -> None:
    result = evaluate(session())
    check = result.monte_carlo()
    assert check.computed and check.agrees, check.note
    # JCGM 101:2008 8.2 with one significant digit: u_c ≈ 0.8 % → δ = 0.05 %.
    assert check.tolerance_pct == pytest.approx(validation_tolerance_pct(result.u_combined_pct))
    assert check.analytic_interval_pct == pytest.approx(
        (-result.U_expanded_pct, result.U_expanded_pct)
    )
    assert result.monte_carlo() == check  # seeded: deterministic


def test_monte_carlo_can_disagree() -> None:
    # Type A means drawn from t distributions (JCGM 101 6.4.9): a set of three readings has
    # ν = 2, whose t distribution is heavy-tailed. Against a deliberately too small analytic U
    # (k = 1) the intervals must be reported as disagreeing.
    from chargebook.corrections.monte_carlo import monte_carlo_check

    inputs = MeasurementInputs(
        routine_bias_V=300.0,
        reduced_bias_V=100.0,
        routine_nC=(20.00, 20.06, 19.94),
        temperature_C=21.0,
        pressure_kPa=100.0,
    )
    result = evaluate(inputs)
    u_routine = result.budget[0].u_rel_pct  # the routine mean's standard error, %
    check = monte_carlo_check(result.uncertainty_model, u_routine, u_routine, 0.95)
    assert check.computed and check.agrees is False
    assert check.u_combined_pct is None  # ν = 2: no finite variance (JCGM 101 6.4.9)
    assert "DISAGREE" in check.note


def test_validation_tolerance_follows_jcgm_101() -> None:
    # JCGM 101:2008 8.2: u_c = 0.77 % with one significant digit is 8 × 10⁻¹ → δ = 0.05 %.
    assert validation_tolerance_pct(0.77) == pytest.approx(0.05)
    assert validation_tolerance_pct(0.77, digits=2) == pytest.approx(0.005)
    assert validation_tolerance_pct(1.5) == pytest.approx(0.5)


# ------------------------------------------------------------------ item 3: the exact ratio


def test_a_voltage_ratio_off_the_table_is_refused_by_name(session: Session) -> None:
    with pytest.raises(InputError) as caught:
        evaluate(session(routine_bias_V=290.0, reduced_bias_V=100.0))
    assert "voltage ratio" in caught.value.field
    assert "boag" in str(caught.value)


def test_a_voltage_ratio_off_the_table_by_boag_if_chosen(session: Session) -> None:
    result = evaluate(
        session(
            routine_bias_V=290.0,
            reduced_bias_V=100.0,
            thresholds=Thresholds(recombination_off_table="boag"),
        )
    )
    assert "k_s_by_boag" in codes(result)
    assert "Boag" in result.factors["k_s"].source
    # Between the n = 2.5 and n = 3 rows of TRS-398 (2000) (from memory), Boag's k_s lies
    # between the two rows' values for the same M1/M2.
    ratio = result.charge_ratio
    bounds = sorted([k_s_tabulated(ratio, 2.5), k_s_tabulated(ratio, 3.0)])
    assert bounds[0] - 1e-3 <= result.factors["k_s"].value <= bounds[1] + 1e-3


def test_bias_resolution_lets_a_near_row_ratio_use_the_row(session: Session) -> None:
    result = evaluate(
        session(
            routine_bias_V=400.0,
            reduced_bias_V=133.0,
            thresholds=Thresholds(bias_resolution_V=1.0),
        )
    )
    assert result.factors["k_s"].value == pytest.approx(k_s_tabulated(result.charge_ratio, 3.0))


# ------------------------------------------------------------------ item 4: plausibility


@pytest.mark.parametrize(
    ("changes", "code"),
    [
        # N_D,w 5.38 cGy/nC typed into the Gy/nC field: about 80 cGy/MU (issue 12 item 4).
        ({"N_Dw_Gy_per_nC": 5.38, "expected_cGy_per_MU": None}, "dose_per_MU_implausible"),
        ({"N_Dw_Gy_per_nC": 5.38, "expected_cGy_per_MU": None}, "N_Dw_unit_suspect"),
        # 760 (mmHg) typed as hPa is 76 kPa: inside 60–110 kPa, but k_TP ≈ 1.34.
        ({"pressure_kPa": 76.0}, "k_TP_implausible"),
        (
            {"routine_nC": (1e8, 1.0001e8, 0.9999e8), "opposite_nC": (), "reduced_nC": ()},
            "charge_implausible",
        ),
    ],
)
def test_unit_slips_are_flagged_with_what_to_check(
    session: Session, changes: dict[str, object], code: str
) -> None:
    result = evaluate(session(**changes))
    assert code in codes(result)
    message = next(f.message for f in result.flags if f.code == code)
    assert "Check" in message or "check" in message


def test_a_pressure_equal_to_the_standard_atmosphere_in_another_unit_is_flagged(
    session: Session,
) -> None:
    from chargebook.corrections.units import Conversion

    typed = Conversion("pressure", 760.0, "hPa", 76.0, "kPa")
    result = evaluate(session(pressure_kPa=76.0, conversions=(typed,)))
    assert "pressure_unit_suspect" in codes(result)


def test_a_sound_session_raises_no_plausibility_flag(session: Session) -> None:
    found = codes(evaluate(session()))
    assert not found & {
        "dose_per_MU_implausible",
        "N_Dw_unit_suspect",
        "k_TP_implausible",
        "charge_implausible",
        "pressure_unit_suspect",
    }


# ------------------------------------------------------------------ item 9: protocol caveats


@pytest.mark.parametrize("reduced", [150.0, 120.0])
def test_trs398_flags_a_voltage_ratio_below_3(session: Session, reduced: float) -> None:
    # n = 2 and 2.5 are tabulated; TRS-398 recommends V1/V2 >= 3 (from memory).
    assert "voltage_ratio_below_3" in codes(evaluate(session(reduced_bias_V=reduced)))
    assert "voltage_ratio_below_3" not in codes(evaluate(session()))


def test_tg51_says_a_pulsed_scanned_beam_gets_the_pulsed_formula(session: Session) -> None:
    result = evaluate(session(convention="tg51", beam="pulsed-scanned"))
    assert "tg51_pulsed_scanned" in codes(result)
    message = next(f.message for f in result.flags if f.code == "tg51_pulsed_scanned")
    # The TRS-398 (2000) pulsed-scanned row n = 3 (from memory) at this session's M1/M2.
    r = result.charge_ratio
    scanned = 2.001 - 2.402 * r + 1.404 * r * r
    assert f"would give {scanned:.4f}" in message
    assert "tg51_pulsed_scanned" not in codes(evaluate(session(convention="tg51")))


# ------------------------------------------------------------------ item 13: return check


def test_return_check_reports_the_ratio_and_flags_a_move(session: Session) -> None:
    steady = evaluate(session(return_nC=(14.748, 14.750, 14.749)))
    assert steady.return_check.ratio == pytest.approx(14.749 / 14.749, abs=1e-4)
    assert "return_check_moved" not in codes(steady)
    moved = evaluate(session(return_nC=(14.80, 14.81, 14.80)))
    # 0.2 % threshold (common practice): 14.803/14.749 − 1 = +0.37 %.
    assert moved.return_check.deviation_pct == pytest.approx(
        100 * (14.80333 / 14.749 - 1), abs=1e-3
    )
    assert "return_check_moved" in codes(moved)
    between = next(c for c in moved.budget if c.component.startswith("between-set"))
    assert between.dof == 1
    assert between.u_rel_pct > 0.2
    assert moved.to_dict()["return_check"]["ratio"] == pytest.approx(moved.return_check.ratio)


def test_the_return_check_is_compared_in_the_routine_sets_air(session: Session) -> None:
    # The chamber reads 0.17 % more after the air warmed 0.5 °C at the same pressure (the
    # TRS-398 (2000) k_TP = ((273.2 + T)/293.2)·(101.325/P) ratio): the output did not move.
    base = session(return_nC=(14.748, 14.750, 14.749))
    T, P = base.temperature_C, base.pressure_kPa
    scale = (273.2 + T + 0.5) / (273.2 + T)
    returned = tuple(charge / scale for charge in base.return_nC)
    warm = {"return": SetEnvironment(T + 0.5, P, "entry 2")}
    checked = evaluate(dataclasses.replace(base, return_nC=returned, set_environments=warm))
    assert checked.return_check.air_scale == pytest.approx(scale, rel=1e-12)
    assert checked.return_check.ratio == pytest.approx(14.749 / 14.749, abs=1e-4)
    assert "return_check_moved" not in codes(checked)
    as_read = evaluate(dataclasses.replace(base, return_nC=returned))
    assert as_read.return_check.deviation_pct == pytest.approx(-0.17, abs=0.01)


# ------------------------------------------------------------------ items 14 and 15


def test_four_readings_003_pct_apart_have_no_outlier() -> None:
    # Issue 12 item 14: the modified z-score on a tiny MAD called a good reading an outlier.
    readings = (20.000, 20.000, 20.001, 20.006)  # 0.03 % apart at most
    assert set_statistics(readings).outliers == ()
    assert set_statistics(readings, outlier_floor_pct=0.01).outliers == (3,)
    # A real spike is still found (Iglewicz and Hoaglin 1993, threshold 3.5).
    assert set_statistics((20.000, 20.002, 20.001, 20.300)).outliers == (3,)


def test_outlier_flag_says_what_the_operator_can_do(session: Session) -> None:
    result = evaluate(session(routine_nC=(14.747, 14.751, 14.749, 14.746, 15.2)))
    message = next(f.message for f in result.flags if f.code == "routine_outlier")
    assert "exclude" not in message
    assert "redo the set" in message


def test_the_conventional_millimetre_of_mercury() -> None:
    # The conventional millimetre of mercury is 133.322 387 415 Pa: 1 mm of mercury of density
    # 13 595.1 kg/m³ under standard gravity 9.806 65 m/s² (by definition; common practice in
    # metrology tables). The torr is 101 325/760 Pa = 133.322 368 Pa: 760 mmHg is the standard
    # atmosphere to 1.5e-7 relative. The old constant 0.133322 kPa was 2.9e-6 short.
    assert pytest.approx(133.322387415, abs=1e-9) == KPA_PER_MMHG * 1000
    assert pytest.approx(101.325, rel=2e-7) == 760 * KPA_PER_MMHG


def test_a_monte_carlo_that_cannot_be_computed_says_why(session: Session) -> None:
    # Opposite-polarity readings scattering close to zero: many draws of their mean take the
    # routine sign, where k_pol has no value. Reported in words, never raised.
    result = evaluate(session(opposite_nC=(-0.05, -0.5, -0.9)))
    check = result.monte_carlo(trials=20_000, seed=1)
    assert not check.computed
    assert check.note.startswith("cannot be computed")
    assert check.invalid_draws > 20
    assert check.to_dict()["interval_pct"] is None
