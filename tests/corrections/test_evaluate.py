"""evaluate(): whole sessions, partial sessions, flags instead of crashes, errors for bad input."""

from __future__ import annotations

import json
from collections.abc import Callable

import pytest
from chargebook.corrections.air_density import k_TP
from chargebook.corrections.errors import InputError
from chargebook.corrections.evaluate import MeasurementInputs, Uncertainties, evaluate
from chargebook.corrections.polarity import k_pol
from chargebook.corrections.recombination import k_s_tabulated
from chargebook.corrections.stability import Thresholds
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

Session = Callable[..., MeasurementInputs]

#: The JSON keys the worksheet command, the daemon and exports rely on (issue item 6).
REQUIRED_KEYS = {
    "convention",
    "beam",
    "symbols",
    "k_TP",
    "k_h",
    "k_pol",
    "k_s",
    "k_elec",
    "factor_states",
    "M_raw_nC",
    "M_corrected_nC",
    "dose_Gy",
    "dose_per_MU_cGy",
    "deviation_pct",
    "within_tolerance",
    "u_combined_pct",
    "U_expanded_pct",
    "budget",
    "flags",
    "sets",
}


def flag_codes(result: dict) -> list[str]:
    return [flag["code"] for flag in result["flags"]]


def test_complete_session_multiplies_the_factors_out(session: Session) -> None:
    inputs = session()
    result = evaluate(inputs)
    routine = sum(inputs.routine_nC) / 5
    opposite = sum(inputs.opposite_nC) / 3
    reduced = sum(inputs.reduced_nC) / 3
    assert result.factors["k_TP"].value == pytest.approx(k_TP(21.8, 100.6), rel=1e-15)
    assert result.factors["k_pol"].value == pytest.approx(k_pol(routine, opposite), rel=1e-12)
    assert result.factors["k_s"].value == pytest.approx(
        k_s_tabulated(routine / reduced, 3.0), rel=1e-12
    )
    product = k_TP(21.8, 100.6) * k_pol(routine, opposite) * k_s_tabulated(routine / reduced, 3.0)
    assert result.M_raw_nC == pytest.approx(routine, rel=1e-12)
    assert result.M_corrected_nC == pytest.approx(routine * product, rel=1e-12)
    assert result.dose_Gy == pytest.approx(routine * product * 0.0538 * 0.992, rel=1e-12)
    assert result.dose_per_MU_cGy == pytest.approx(result.dose_Gy, rel=1e-12)  # 100 MU
    assert result.deviation_pct == pytest.approx(100 * (result.dose_per_MU_cGy / 0.8 - 1), rel=1e-9)
    assert result.U_expanded_pct == pytest.approx(result.coverage_factor * result.u_combined_pct)


def test_to_dict_has_the_documented_keys_and_is_json(session: Session) -> None:
    result = evaluate(session()).to_dict()
    assert set(result) >= REQUIRED_KEYS
    assert json.loads(json.dumps(result)) == result
    # One rule (corrections.evaluate): measured = from this session's readings, thermometer and
    # barometer; entered = the factor typed in; default = the protocols' conventional value.
    assert result["factor_states"] == {
        "k_TP": "measured",
        "k_h": "default",
        "k_pol": "measured",
        "k_s": "measured",
        "k_elec": "entered",
        "N_Dw": "entered",
        "k_Q": "entered",
    }
    assert set(result["sets"]) == {"routine", "opposite", "reduced"}


def test_deterministic(session: Session) -> None:
    assert evaluate(session()).to_dict() == evaluate(session()).to_dict()


def test_nothing_known_yet_is_not_an_error() -> None:
    result = evaluate(MeasurementInputs()).to_dict()
    assert result["M_raw_nC"] is None
    assert result["dose_Gy"] is None
    assert result["u_combined_pct"] is None
    assert result["factor_states"]["k_TP"] == "pending"
    assert result["factor_states"]["k_pol"] == "pending"
    assert result["budget"] == []


def test_one_reading_says_sd_is_undefined(session: Session) -> None:
    result = evaluate(session(routine_nC=[14.75], opposite_nC=(), reduced_nC=())).to_dict()
    assert result["M_raw_nC"] == 14.75
    assert result["sets"]["routine"]["sd_nC"] is None
    assert "routine_single_reading" in flag_codes(result)
    assert result["u_combined_pct"] is None


@pytest.mark.parametrize(
    ("change", "pending"),
    [
        ({"opposite_nC": ()}, "k_pol"),
        ({"reduced_nC": ()}, "k_s"),
        ({"reduced_bias_V": None}, "k_s"),
        ({"temperature_C": None}, "k_TP"),
        ({"pressure_kPa": None}, "k_TP"),
    ],
)
def test_pending_factor_is_never_taken_as_one(session: Session, change: dict, pending: str) -> None:
    result = evaluate(session(**change)).to_dict()
    assert result["factor_states"][pending] == "pending"
    assert result[pending] is None
    assert result["M_raw_nC"] is not None
    for key in ("M_corrected_nC", "dose_Gy", "dose_per_MU_cGy", "deviation_pct", "u_combined_pct"):
        assert result[key] is None, key


def test_missing_calibration_leaves_dose_pending_but_charge_corrected(session: Session) -> None:
    result = evaluate(session(N_Dw_Gy_per_nC=None)).to_dict()
    assert result["M_corrected_nC"] is not None
    assert result["u_M_corrected_pct"] is not None
    assert result["dose_Gy"] is None
    assert result["factor_states"]["N_Dw"] == "pending"


def test_k_elec_default_is_stated(session: Session) -> None:
    result = evaluate(session(k_elec=None)).to_dict()
    assert result["k_elec"] == 1.0
    assert result["factor_states"]["k_elec"] == "default"
    assert "k_elec_assumed" in flag_codes(result)


@pytest.mark.parametrize(
    ("humidity_pct", "words", "flag"),
    [
        (None, "no humidity entered; 1 assumed", "k_h_assumed"),
        (45.0, "45 % RH entered, within 20–80 % RH: 1 by rule", None),
        (85.0, "85 % RH entered, outside 20–80 % RH: 1 used", "humidity_out_of_band"),
    ],
)
def test_k_h_is_one_by_rule_and_never_called_measured(
    session: Session, humidity_pct: float | None, words: str, flag: str | None
) -> None:
    # k_h = 1 for 20–80 % RH with a chamber calibrated near 50 % RH (both protocols, from
    # memory): nothing is computed from the humidity, so the state is "default" in every case
    # and the source and flags say whether the entered humidity supports the rule.
    result = evaluate(session(humidity_pct=humidity_pct))
    factor = result.factors["k_h"]
    assert (factor.value, factor.state) == (1.0, "default")
    assert words in factor.source
    codes = flag_codes(result.to_dict())
    assert {"k_h_assumed", "humidity_out_of_band"} & set(codes) == ({flag} if flag else set())


def test_k_TP_from_thermometer_and_barometer_is_measured(session: Session) -> None:
    # T and P are this session's measurements (typed in or sent by a sensor): k_TP is
    # "measured", and pending without either.
    assert evaluate(session()).factors["k_TP"].state == "measured"
    assert evaluate(session(temperature_C=None)).factors["k_TP"].state == "pending"


def test_k_pol_source_prints_the_chosen_protocols_formula(session: Session) -> None:
    # TRS-398 writes (|M+| + |M−|)/(2|M|); TG-51 writes |(M+ − M−)/(2M)| (docs/physics.md).
    assert evaluate(session()).factors["k_pol"].source == "(|M+| + |M−|) / (2|M|)"
    assert evaluate(session(convention="tg51")).factors["k_pol"].source == "|(M+ − M−) / (2M)|"


def test_tg51_names_its_symbols(session: Session) -> None:
    result = evaluate(session(convention="tg51")).to_dict()
    assert result["symbols"]["k_TP"] == "P_TP"
    assert result["symbols"]["k_s"] == "P_ion"
    assert result["reference_temperature_C"] == 22.0
    routine, reduced = sum(session().routine_nC) / 5, sum(session().reduced_nC) / 3
    # TG-51: P_ion = (1 − n)/(M1/M2 − n).
    assert result["k_s"] == pytest.approx((1 - 3) / (routine / reduced - 3), rel=1e-12)


def test_large_k_s_is_a_flag_not_a_crash(session: Session) -> None:
    reduced = tuple(r / 1.12 for r in session().routine_nC[:3])
    result = evaluate(session(reduced_nC=reduced)).to_dict()
    assert result["k_s"] > 1.05
    assert "k_s_large" in flag_codes(result)
    assert result["dose_Gy"] is not None


def test_large_polarity_effect_is_a_flag_not_a_crash(session: Session) -> None:
    result = evaluate(session(opposite_nC=(-14.90, -14.91, -14.90))).to_dict()
    assert abs(result["k_pol"] - 1) > 0.004
    assert "k_pol_large" in flag_codes(result)


def test_out_of_tolerance_output(session: Session) -> None:
    result = evaluate(session(expected_cGy_per_MU=0.78, tolerance_pct="annual")).to_dict()
    assert result["within_tolerance"] is False
    assert result["tolerance_pct"] == 1.0
    assert "outside_tolerance" in flag_codes(result)
    assert evaluate(session()).to_dict()["within_tolerance"] is True


def test_default_tolerance_is_stated(session: Session) -> None:
    result = evaluate(session()).to_dict()
    assert result["tolerance_pct"] == 2.0  # AAPM TG-142 monthly output constancy
    assert "TG-142" in result["tolerance_source"]


def test_missing_type_b_uncertainty_is_flagged(session: Session) -> None:
    result = evaluate(session(uncertainties=Uncertainties())).to_dict()
    assert "uncertainty_incomplete" in flag_codes(result)
    assert result["u_combined_pct"] < 0.2


def budget_line(result: dict, component: str) -> dict:
    return next(line for line in result["budget"] if line["component"] == component)


def test_k_elec_entered_without_its_uncertainty_is_not_taken_as_exact(session: Session) -> None:
    # GUM (JCGM 100:2008): an input with an unknown uncertainty cannot count as exact. A k_elec
    # from a separate electrometer calibration carries its own uncertainty: left out and said.
    result = evaluate(session(k_elec=0.998)).to_dict()
    assert budget_line(result, "k_elec")["u_rel_pct"] is None
    assert result["factor_u_rel_pct"]["k_elec"] is None
    flag = next(f for f in result["flags"] if f["code"] == "uncertainty_incomplete")
    assert "k_elec" in flag["message"] and "dose" in flag["message"]
    given = evaluate(
        session(k_elec=0.998, uncertainties=Uncertainties(1.1, 1.0, u_k_elec_pct=0.1))
    ).to_dict()
    assert budget_line(given, "k_elec")["u_rel_pct"] == 0.1
    assert "uncertainty_incomplete" not in flag_codes(given)


def test_k_elec_not_entered_is_exact_within_the_joint_calibration(session: Session) -> None:
    # Chamber and electrometer calibrated together: k_elec = 1 with no uncertainty of its own
    # (N_D,w's certificate covers the pair; docs/physics.md).
    result = evaluate(session(k_elec=None)).to_dict()
    assert budget_line(result, "k_elec")["u_rel_pct"] == 0.0
    assert "uncertainty_incomplete" not in flag_codes(result)


def test_missing_uncertainty_of_the_charge_is_flagged_without_a_dose(session: Session) -> None:
    # No N_D,w yet, so no dose: the corrected charge's u_c still must not hide a missing input.
    no_type_b = Uncertainties()  # neither N_D,w's nor k_Q's nor k_elec's uncertainty given
    result = evaluate(session(N_Dw_Gy_per_nC=None, k_elec=0.998, uncertainties=no_type_b)).to_dict()
    assert result["dose_Gy"] is None and result["u_M_corrected_pct"] is not None
    flag = next(f for f in result["flags"] if f["code"] == "uncertainty_incomplete")
    assert "k_elec" in flag["message"] and "corrected charge" in flag["message"]
    assert "k_Q" not in flag["message"]  # k_Q and N_D,w are not part of the corrected charge


def test_certificate_uncertainty_is_halved(session: Session) -> None:
    # GUM: an expanded uncertainty stated at k = 2 is divided by 2 for the standard uncertainty.
    result = evaluate(session())
    assert result.factors["N_Dw"].u_rel_pct == pytest.approx(0.55)


def test_leakage_and_changing_environment_flags(session: Session) -> None:
    result = evaluate(
        session(leakage_nC=0.05, temperature_history_C=(20.9, 21.8), pressure_history_kPa=(100.6,))
    ).to_dict()
    assert {"leakage_high", "temperature_changing"} <= set(flag_codes(result))


def test_continuous_beam(session: Session) -> None:
    result = evaluate(session(beam="continuous", reduced_bias_V=150.0)).to_dict()
    ratio = result["charge_ratio"]
    assert result["k_s"] == pytest.approx((4 - 1) / (4 - ratio), rel=1e-12)  # n = 2


@pytest.mark.parametrize(
    ("change", "field", "words"),
    [
        ({"temperature_C": "21.8"}, "temperature_C", "is not a number"),
        ({"temperature_C": 80.0}, "temperature_C", "10 to 40 °C"),
        ({"pressure_kPa": 1006.0}, "pressure_kPa", "60 to 110 kPa"),
        ({"humidity_pct": 140.0}, "humidity_pct", "0 to 100 %"),
        ({"routine_bias_V": 3000.0}, "|routine_bias_V|", "10 to 1000 V"),
        ({"routine_bias_V": "high"}, "routine_bias_V", "is not a number"),
        (
            {"reduced_bias_V": 130.0},
            "voltage ratio routine_bias_V/reduced_bias_V",
            "not a tabulated voltage ratio",
        ),
        ({"reduced_bias_V": -100.0}, "reduced_bias_V", "opposite polarity"),
        ({"routine_nC": (14.7, -14.7, 14.7)}, "routine_nC[1]", "contradicts the bias"),
        ({"opposite_nC": (14.7, 14.7)}, "opposite_nC", "contradicts its bias"),
        ({"reduced_nC": (-14.5, -14.5)}, "reduced_nC", "contradicts its bias"),
        ({"routine_nC": (14.7, "x")}, "routine_nC[1]", "is not a number"),
        ({"N_Dw_Gy_per_nC": -0.0538}, "N_Dw_Gy_per_nC", "0.0001 to 100 Gy/nC"),
        ({"k_Q": 0.0}, "k_Q", "0.8 to 1.2"),
        ({"monitor_units": -100.0}, "monitor_units", "MU"),
        ({"beam": "proton"}, "beam", "pulsed, pulsed-scanned, continuous"),
        ({"convention": "din"}, "convention", "trs398 or tg51"),
        ({"tolerance_pct": "weekly"}, "tolerance_pct", "daily, monthly, annual"),
        ({"uncertainties": Uncertainties(u_k_Q_pct=-1.0)}, "uncertainties.u_k_Q_pct", "0 to 50 %"),
        ({"temperature_history_C": (20.0, 99.0)}, "temperature_history_C[1]", "10 to 40 °C"),
    ],
)
def test_invalid_input_names_field_value_and_range(
    session: Session, change: dict, field: str, words: str
) -> None:
    with pytest.raises(InputError) as caught:
        evaluate(session(**change))
    assert caught.value.field == field
    assert words in str(caught.value)
    assert str(caught.value).startswith(field)


def test_outlier_threshold_reaches_the_statistics(session: Session) -> None:
    readings = (14.747, 14.751, 14.749, 14.746, 14.78)
    loose = evaluate(session(routine_nC=readings, thresholds=Thresholds(outlier_modified_z=50.0)))
    strict = evaluate(session(routine_nC=readings))
    assert loose.sets["routine"].outliers == ()
    assert strict.sets["routine"].outliers == (4,)


@settings(max_examples=40, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.floats(0.05, 20.0))
def test_scale_invariant_in_charge(session: Session, scale: float) -> None:
    # Scaling every reading scales the corrected charge and leaves every ratio factor alone.
    base = session()
    scaled = session(
        routine_nC=tuple(r * scale for r in base.routine_nC),
        opposite_nC=tuple(r * scale for r in base.opposite_nC),
        reduced_nC=tuple(r * scale for r in base.reduced_nC),
        N_Dw_Gy_per_nC=None,
    )
    a, b = evaluate(session(N_Dw_Gy_per_nC=None)), evaluate(scaled)
    assert b.factors["k_pol"].value == pytest.approx(a.factors["k_pol"].value, rel=1e-9)
    assert b.factors["k_s"].value == pytest.approx(a.factors["k_s"].value, rel=1e-9)
    assert b.M_corrected_nC == pytest.approx(a.M_corrected_nC * scale, rel=1e-9)
    assert b.u_M_corrected_pct == pytest.approx(a.u_M_corrected_pct, rel=1e-6)


@settings(max_examples=40, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.floats(10.0, 40.0), st.floats(10.0, 40.0), st.floats(60.0, 110.0))
def test_dose_monotonic_in_temperature(session: Session, t1: float, t2: float, p: float) -> None:
    low, high = sorted((t1, t2))
    cold = evaluate(session(temperature_C=low, pressure_kPa=p)).dose_Gy
    warm = evaluate(session(temperature_C=high, pressure_kPa=p)).dose_Gy
    assert cold <= warm


@settings(max_examples=40, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.floats(10.0, 40.0), st.floats(60.0, 110.0), st.floats(60.0, 110.0))
def test_dose_falls_as_pressure_rises(session: Session, t: float, p1: float, p2: float) -> None:
    # Denser air gives more ionisation per unit dose (gas law; k_TP ∝ 1/P, TRS-398, TG-51).
    low, high = sorted((p1, p2))
    for convention in ("trs398", "tg51"):
        thin = evaluate(session(temperature_C=t, pressure_kPa=low, convention=convention))
        dense = evaluate(session(temperature_C=t, pressure_kPa=high, convention=convention))
        assert thin.dose_Gy >= dense.dose_Gy


def test_signs_are_checked_between_sets_even_before_the_routine_set() -> None:
    with pytest.raises(InputError) as caught:
        evaluate(MeasurementInputs(opposite_nC=(-14.7,), reduced_nC=(-14.5,)))
    assert caught.value.field == "reduced_nC"
    assert "opposite sign to the opposite-polarity readings" in str(caught.value)


@pytest.mark.parametrize("convention", ["trs398", "tg51"])
def test_reduced_bias_larger_than_routine_is_flagged(session: Session, convention: str) -> None:
    # M1/M2 = 0.99 at n = 3 gives k_s = 0.9953 (TRS-398 quadratic, n = 3 row, from memory) or
    # P_ion = 2/2.01 = 0.9950 (TG-51 1999 linear form): impossible, so flagged.
    reduced = tuple(r / 0.99 for r in session().routine_nC[:3])
    result = evaluate(session(convention=convention, reduced_nC=reduced)).to_dict()
    assert result["k_s"] < 0.999
    assert "k_s_below_one" in flag_codes(result)


def test_equal_readings_are_not_flagged_below_one(session: Session) -> None:
    result = evaluate(session(reduced_nC=session().routine_nC)).to_dict()
    assert "k_s_below_one" not in flag_codes(result)
