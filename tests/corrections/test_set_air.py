"""Air density per set: each set's mean referred to reference air with the air it was taken in.

Check values: the TRS-398 air-density formula k_TP = ((273.2 + T)/(273.2 + T0))·(P0/P), T0 =
20 °C, P0 = 101.325 kPa (IAEA TRS-398 (2000)), written out here independently of the library;
k_pol = (|M+| + |M−|)/(2|M|) (TRS-398) and the tabulated k_s quadratic (TRS-398 (2000), the
library's table). The identity checked: with a k_TP per set, k_pol and k_s are those of the
readings scaled by their own k_TP (docs/physics.md, air density per set).
"""

from __future__ import annotations

import statistics
from collections.abc import Callable

import pytest
from chargebook.corrections.errors import InputError
from chargebook.corrections.evaluate import MeasurementInputs, evaluate
from chargebook.corrections.recombination import k_s_tabulated
from chargebook.corrections.set_air import SetEnvironment

Session = Callable[..., MeasurementInputs]


def trs398_k_TP(temperature_C: float, pressure_kPa: float) -> float:
    """TRS-398 (2000) k_TP, written out here (reference 20 °C, 101.325 kPa)."""
    return ((273.2 + temperature_C) / (273.2 + 20.0)) * (101.325 / pressure_kPa)


#: The worked case: T rises 0.4 °C between the routine and the opposite set, and the pressure
#: falls 0.15 kPa before the reduced-bias set (both inside the change-flag limits).
ROUTINE_AIR = SetEnvironment(21.8, 100.6, "entry 1")
OPPOSITE_AIR = SetEnvironment(22.2, 100.6, "entry 2")
REDUCED_AIR = SetEnvironment(22.2, 100.45, "entry 3")


def per_set(session: Session) -> MeasurementInputs:
    return session(
        temperature_C=22.2,
        pressure_kPa=100.45,
        set_environments={
            "routine": ROUTINE_AIR,
            "opposite": OPPOSITE_AIR,
            "reduced": REDUCED_AIR,
        },
    )


def test_k_pol_is_formed_from_means_corrected_with_each_sets_own_air(session: Session) -> None:
    inputs = per_set(session)
    result = evaluate(inputs)
    # Each reading scaled by the k_TP of its own set, then the published formula.
    k_r = trs398_k_TP(21.8, 100.6)
    k_o = trs398_k_TP(22.2, 100.6)
    routine = statistics.fmean(m * k_r for m in inputs.routine_nC)
    opposite = statistics.fmean(m * k_o for m in inputs.opposite_nC)
    expected = (abs(routine) + abs(opposite)) / (2 * abs(routine))
    assert result.factors["k_pol"].value == pytest.approx(expected, rel=1e-12)
    raw = statistics.fmean(inputs.routine_nC), statistics.fmean(inputs.opposite_nC)
    uncorrected = (abs(raw[0]) + abs(raw[1])) / (2 * abs(raw[0]))
    assert abs(result.factors["k_pol"].value - uncorrected) > 5e-4  # the 0.4 °C shows


def test_k_s_uses_the_air_corrected_charge_ratio(session: Session) -> None:
    inputs = per_set(session)
    result = evaluate(inputs)
    M1 = statistics.fmean(inputs.routine_nC) * trs398_k_TP(21.8, 100.6)
    M2 = statistics.fmean(inputs.reduced_nC) * trs398_k_TP(22.2, 100.45)
    assert result.charge_ratio == pytest.approx(M1 / M2, rel=1e-12)
    assert result.factors["k_s"].value == pytest.approx(k_s_tabulated(M1 / M2, 3.0), rel=1e-12)


def test_the_routine_set_gets_its_own_k_TP_and_the_dose_follows(session: Session) -> None:
    inputs = per_set(session)
    result = evaluate(inputs)
    k_r = trs398_k_TP(21.8, 100.6)
    assert result.factors["k_TP"].value == pytest.approx(k_r, rel=1e-6)  # 273.2 as the code
    routine = statistics.fmean(inputs.routine_nC)
    M1 = routine * k_r
    M_opp = statistics.fmean(inputs.opposite_nC) * trs398_k_TP(22.2, 100.6)
    M2 = statistics.fmean(inputs.reduced_nC) * trs398_k_TP(22.2, 100.45)
    k_pol = (abs(M1) + abs(M_opp)) / (2 * abs(M1))
    M_Q = M1 * k_pol * k_s_tabulated(M1 / M2, 3.0) * inputs.k_elec
    assert result.M_corrected_nC == pytest.approx(M_Q, rel=1e-12)
    # The old rule (the latest entry for every set) gives the routine set the reduced set's
    # air: its k_TP alone is off by +0.29 %, and k_pol and k_s add to it.
    old = evaluate(session(temperature_C=22.2, pressure_kPa=100.45))
    routine_error = trs398_k_TP(22.2, 100.45) / k_r - 1
    assert 100 * routine_error == pytest.approx(0.29, abs=0.005)
    assert old.factors["k_TP"].value / result.factors["k_TP"].value - 1 == pytest.approx(
        routine_error, rel=1e-5
    )
    assert old.M_corrected_nC / M_Q - 1 > routine_error
    assert "routine set: entry 1" in result.factors["k_TP"].source


def test_sets_sharing_one_air_give_the_scalar_result_bit_for_bit(session: Session) -> None:
    same = SetEnvironment(21.8, 100.6, "entry 1")
    shared = session(set_environments={"routine": same, "opposite": same, "reduced": same})
    a, b = evaluate(shared).to_dict(), evaluate(session()).to_dict()
    for key in ("k_TP", "k_pol", "k_s", "M_corrected_nC", "dose_Gy", "u_combined_pct"):
        assert a[key] == b[key]


def test_each_set_shows_the_air_it_used(session: Session) -> None:
    result = evaluate(per_set(session)).to_dict()
    assert result["set_air"]["opposite"]["temperature_C"] == 22.2
    assert result["set_air"]["opposite"]["source"] == "entry 2"
    assert result["set_air"]["reduced"]["k_TP"] == pytest.approx(
        trs398_k_TP(22.2, 100.45), rel=1e-6
    )
    scalar = evaluate(session()).to_dict()["set_air"]
    assert scalar["routine"]["source"] == "the session-wide entry"


def test_a_set_environment_out_of_range_names_the_set(session: Session) -> None:
    bad = session(set_environments={"opposite": SetEnvironment(45.0, 100.6)})
    with pytest.raises(InputError, match=r"set_environments\.opposite\.temperature_C"):
        evaluate(bad)
    with pytest.raises(InputError, match="set_environments"):
        evaluate(session(set_environments={"leakage": SetEnvironment(21.0, 100.6)}))


def test_a_change_between_sets_beyond_the_limit_is_still_flagged(session: Session) -> None:
    moved = session(set_environments={"opposite": SetEnvironment(22.6, 100.6)})
    codes = [flag.code for flag in evaluate(moved).flags]
    assert "temperature_changing" in codes
    assert "temperature_changing" not in [flag.code for flag in evaluate(session()).flags]
