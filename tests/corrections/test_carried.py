"""Carried k_pol and k_s: a routine-only output check gives a dose, with provenance and age."""

from __future__ import annotations

from collections.abc import Callable

import pytest
from chargebook.corrections.air_density import k_TP
from chargebook.corrections.carried import CarriedFactor, carried_factor
from chargebook.corrections.errors import InputError
from chargebook.corrections.evaluate import MeasurementInputs, evaluate
from chargebook.corrections.monte_carlo import monte_carlo_u_pct
from chargebook.corrections.stability import Thresholds

Session = Callable[..., MeasurementInputs]

K_POL = CarriedFactor(1.0012, "session 12 of 2026-11-05, full calibration", "2026-11-05", 0.03)
K_S = CarriedFactor(1.0118, "entered: annual calibration report 2026-03", "2026-03-02")


def routine_only(session: Session, **changes: object) -> MeasurementInputs:
    values: dict[str, object] = {
        "opposite_nC": (),
        "reduced_nC": (),
        "carried": {"k_pol": K_POL, "k_s": K_S},
        "measured_on": "2026-12-03",
    }
    values.update(changes)
    return session(**values)


def test_dose_with_carried_factors_is_the_trs398_product(session: Session) -> None:
    inputs = routine_only(session)
    result = evaluate(inputs)
    M = sum(inputs.routine_nC) / len(inputs.routine_nC)
    # TRS-398 (IAEA 2000), D_w,Q = M · k_TP · k_h · k_pol · k_s · k_elec · N_D,w · k_Q, with
    # k_h = 1 (45 % RH, within 20–80 %) and k_elec = 1 as entered.
    expected = M * k_TP(21.8, 100.6) * 1.0 * 1.0012 * 1.0118 * 1.0 * 0.0538 * 0.992
    assert result.dose_Gy == pytest.approx(expected, rel=1e-12)
    assert result.factors["k_pol"].state == "carried"
    assert result.factors["k_s"].state == "carried"
    assert "session 12 of 2026-11-05" in result.factors["k_pol"].source
    assert "dated 2026-03-02" in result.factors["k_s"].source
    document = result.to_dict()
    assert document["factor_states"]["k_pol"] == "carried"
    assert document["carried"]["k_pol"]["age_days"] == 28
    assert document["carried"]["k_s"]["source"] == K_S.source


def test_carried_values_of_a_full_session_give_its_dose_bit_for_bit(session: Session) -> None:
    """Identity: a routine-only evaluation with the full session's own k_pol and k_s carried
    gives the full session's dose exactly (same readings, same factors, same product)."""
    full = evaluate(session())
    carried = {
        key: CarriedFactor(full.factors[key].value, "the full session", "2026-12-03")
        for key in ("k_pol", "k_s")
    }
    check = evaluate(session(opposite_nC=(), reduced_nC=(), carried=carried))
    assert check.dose_Gy == full.dose_Gy
    assert check.M_corrected_nC == full.M_corrected_nC


def test_carried_uncertainty_is_a_type_b_line_and_not_given_is_flagged(session: Session) -> None:
    result = evaluate(routine_only(session))
    lines = {line.component: line for line in result.budget}
    assert lines["k_pol carried"].u_rel_pct == pytest.approx(0.03)
    assert lines["k_pol carried"].source.startswith("Type B: carried")
    assert lines["k_s carried"].u_rel_pct is None
    assert "uncertainty_incomplete" in [flag.code for flag in result.flags]
    assert "k_s carried" in next(
        f.message for f in result.flags if f.code == "uncertainty_incomplete"
    )
    # The Monte Carlo check of GUM Supplement 1 (JCGM 101:2008) agrees with the analytic u_c.
    mc = monte_carlo_u_pct(result.uncertainty_model, trials=200_000)
    assert mc == pytest.approx(result.u_combined_pct, rel=0.02)


def test_a_factor_not_measured_is_flagged_only_while_nothing_is_carried(session: Session) -> None:
    def codes(**changes: object) -> list[str]:
        result = evaluate(routine_only(session, not_measured=("k_pol", "k_s"), **changes))
        return [flag.code for flag in result.flags]

    assert "k_pol_not_measured" not in codes()
    assert "k_pol_not_measured" in codes(carried={"k_s": K_S})
    assert "k_s_not_measured" not in codes(carried={"k_s": K_S})


def test_both_measured_and_carried_is_refused_by_name(session: Session) -> None:
    with pytest.raises(InputError, match=r"carried\.k_pol .*is both measured and carried"):
        evaluate(session(carried={"k_pol": K_POL}))
    with pytest.raises(InputError, match=r"carried\.k_s .*is both measured and carried"):
        evaluate(session(carried={"k_s": K_S}))


def test_a_carried_factor_dated_after_the_measurement_is_refused(session: Session) -> None:
    future = CarriedFactor(1.001, "entered", "2027-01-10")
    with pytest.raises(InputError, match=r"carried\.k_pol\.date = '2027-01-10' is in the future"):
        evaluate(routine_only(session, carried={"k_pol": future}))


def test_an_old_carried_factor_is_flagged_at_the_set_age(session: Session) -> None:
    old = CarriedFactor(1.001, "session 3", "2025-11-01")  # 397 days before 2026-12-03
    result = evaluate(routine_only(session, carried={"k_pol": old, "k_s": K_S}))
    flag = next(f for f in result.flags if f.code == "k_pol_carried_old")
    assert "397 days" in flag.message and "more than 365" in flag.message
    relaxed = evaluate(
        routine_only(
            session,
            carried={"k_pol": old, "k_s": K_S},
            thresholds=Thresholds(carried_max_age_days=400),
        )
    )
    assert "k_pol_carried_old" not in [f.code for f in relaxed.flags]


@pytest.mark.parametrize(
    ("table", "field", "problem"),
    [
        ({"source": "x", "date": "2026-01-01"}, "carried.k_pol.value", "is missing"),
        ({"value": 1.0, "date": "2026-01-01"}, "carried.k_pol.source", "is missing"),
        ({"value": 1.0, "source": "  ", "date": "2026-01-01"}, "carried.k_pol.source", "is empty"),
        ({"value": 1.0, "source": "x"}, "carried.k_pol.date", "is missing"),
        ({"value": 1.0, "source": "x", "date": "March"}, "carried.k_pol.date", "is not a date"),
        ({"value": 2.0, "source": "x", "date": "2026-01-01"}, "carried.k_pol.value", "outside"),
        ({"value": 1.0, "source": "x", "date": "2026-01-01", "u": 1}, "carried.k_pol.u", "known"),
    ],
)
def test_a_bad_carried_table_is_refused_by_name(table: dict, field: str, problem: str) -> None:
    with pytest.raises(InputError) as raised:
        carried_factor("carried.k_pol", table, on="2026-12-03")
    assert raised.value.field == field
    assert problem in str(raised.value)
