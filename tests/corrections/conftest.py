"""Shared inputs for the corrections tests: one complete session, changed per test.

The readings are invented (our demo clinic); they are inputs, never check values.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable

import pytest
from chargebook.corrections.evaluate import MeasurementInputs, Uncertainties

COMPLETE = MeasurementInputs(
    convention="trs398",
    beam="pulsed",
    temperature_C=21.8,
    pressure_kPa=100.6,
    humidity_pct=45.0,
    routine_bias_V=300.0,
    reduced_bias_V=100.0,
    routine_nC=(14.747, 14.751, 14.749, 14.746, 14.752),
    opposite_nC=(-14.775, -14.777, -14.774),
    reduced_nC=(14.570, 14.567, 14.569),
    N_Dw_Gy_per_nC=0.0538,
    k_Q=0.992,
    k_elec=1.0,
    monitor_units=100.0,
    expected_cGy_per_MU=0.8,
    uncertainties=Uncertainties(u_N_Dw_pct_k2=1.1, u_k_Q_pct=1.0),
)


@pytest.fixture
def session() -> Callable[..., MeasurementInputs]:
    """Return a factory: the complete session with the given fields replaced."""

    def make(**changes: object) -> MeasurementInputs:
        return dataclasses.replace(COMPLETE, **changes)

    return make
