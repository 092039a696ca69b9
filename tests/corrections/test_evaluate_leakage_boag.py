"""evaluate(): leakage as a share of the routine reading, subtracted only by choice; and Boag's
cross-check shown beside the protocol's k_s.

Check values: Boag's collection efficiency f(u) = ln(1 + u)/u for a pulsed beam (Boag's theory,
as in TRS-398 (2000) and docs/physics.md), solved here by plain bisection on u in Python floats,
independently of the library's vectorised bisection on ln(1 + n·u); the leakage share is plain
arithmetic (common practice).
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Callable

import pytest
from chargebook.corrections.evaluate import MeasurementInputs, evaluate

Session = Callable[..., MeasurementInputs]


def boag_k_s(ratio: float, n: float) -> float:
    """k_s = 1/f(u) with f(u)/f(n·u) = M1/M2 (M1/M2 > 1), by bisection on u in (0, 50]."""

    def f(u: float) -> float:
        return math.log1p(u) / u

    low, high = 1e-12, 50.0  # f(u)/f(n·u) rises with u
    for _ in range(200):
        middle = 0.5 * (low + high)
        if f(middle) / f(n * middle) > ratio:
            high = middle
        else:
            low = middle
    return 1.0 / f(0.5 * (low + high))


@pytest.mark.parametrize("beam", ["pulsed", "pulsed-scanned"])
def test_boag_is_shown_beside_the_tabulated_k_s_with_its_difference(
    session: Session, beam: str
) -> None:
    result = evaluate(session(beam=beam)).to_dict()
    ratio = result["charge_ratio"]
    assert result["k_s_boag"] == pytest.approx(boag_k_s(ratio, 3.0), rel=1e-9)
    expected = 100 * (result["k_s"] / result["k_s_boag"] - 1)
    assert result["k_s_boag_difference_pct"] == pytest.approx(expected, rel=1e-12)


def test_boag_agrees_with_the_pulsed_table_within_a_tenth_of_a_percent(session: Session) -> None:
    # The TRS-398 (2000) pulsed quadratics are fits to Boag's theory: within about 0.1 % for
    # k_s <= 1.05 (from memory; docs/physics.md).
    result = evaluate(session(beam="pulsed")).to_dict()
    assert abs(result["k_s_boag_difference_pct"]) < 0.1


def test_no_boag_cross_check_for_a_continuous_beam(session: Session) -> None:
    result = evaluate(session(beam="continuous", reduced_bias_V=150.0)).to_dict()
    assert result["k_s_boag"] is None and result["k_s_boag_difference_pct"] is None


def test_leakage_is_a_share_of_the_routine_reading_and_is_not_subtracted(session: Session) -> None:
    inputs = session(leakage_nC=0.003)
    result = evaluate(inputs)
    routine = statistics.fmean(inputs.routine_nC)
    assert result.leakage_pct == pytest.approx(100 * 0.003 / routine, rel=1e-12)
    assert result.leakage_subtracted is False
    assert result.M_corrected_nC == evaluate(session()).M_corrected_nC


def test_leakage_is_subtracted_from_the_routine_mean_when_chosen(session: Session) -> None:
    kept = evaluate(session(leakage_nC=0.003))
    taken = evaluate(session(leakage_nC=0.003, subtract_leakage=True))
    routine = statistics.fmean(session().routine_nC)
    assert taken.leakage_subtracted is True
    assert taken.M_corrected_nC / kept.M_corrected_nC == pytest.approx(
        (routine - 0.003) / routine, rel=1e-12
    )
    assert taken.factors["k_pol"].value == kept.factors["k_pol"].value


def test_high_leakage_says_whether_it_was_subtracted(session: Session) -> None:
    words = {
        choice: next(
            f.message
            for f in evaluate(session(leakage_nC=0.05, subtract_leakage=choice)).flags
            if f.code == "leakage_high"
        )
        for choice in (False, True)
    }
    assert "not subtracted" in words[False]
    assert "subtracted from the routine reading" in words[True]


def test_subtraction_chosen_without_a_leakage_reading_is_said(session: Session) -> None:
    codes = [f.code for f in evaluate(session(subtract_leakage=True)).flags]
    assert "leakage_not_measured" in codes
