"""The coverage factor's search: Newton's method within a bisection bracket, checked against
JCGM 100:2008 (GUM) Table G.2 and counted in evaluations of the t distribution's tail."""

from __future__ import annotations

import math

import pytest
from chargebook.corrections import student_t


@pytest.mark.parametrize(
    ("dof", "k_95", "k_99"),
    [
        # JCGM 100:2008, Table G.2, the 95 % and 99 % columns, to the two decimals quoted there
        (1, 12.71, 63.66),
        (5, 2.57, 4.03),
        (10, 2.23, 3.17),
        (30, 2.04, 2.75),
        (math.inf, 1.96, 2.58),
    ],
)
def test_the_coverage_factor_is_found_in_a_few_looks_at_the_tail(
    monkeypatch, dof: float, k_95: float, k_99: float
) -> None:
    looks: list[float] = []
    tail = student_t.two_sided_tail

    def counted(t: float, nu: float) -> float:  # counts, changes nothing
        looks.append(t)
        return tail(t, nu)

    monkeypatch.setattr(student_t, "two_sided_tail", counted)
    for probability, expected in ((0.95, k_95), (0.99, k_99)):
        looks.clear()
        k = student_t.coverage_factor(dof, probability)
        assert round(k, 2) == expected
        assert tail(k, dof) == pytest.approx(1 - probability, rel=1e-9)
        assert len(looks) <= 16  # bisection alone took 45 to 50
