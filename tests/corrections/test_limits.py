"""Range checks refuse non-numbers, non-finite values and values outside the range, by name."""

from __future__ import annotations

import numpy as np
import pytest
from chargebook.corrections.errors import InputError
from chargebook.corrections.limits import (
    BIAS_MAGNITUDE_V,
    PRESSURE_KPA,
    TEMPERATURE_C,
    as_number,
)


def test_plausible_ranges_are_the_documented_ones() -> None:
    # Common practice (docs/physics.md "Plausible input ranges").
    assert (TEMPERATURE_C.low, TEMPERATURE_C.high) == (10.0, 40.0)
    assert (PRESSURE_KPA.low, PRESSURE_KPA.high) == (60.0, 110.0)
    assert (BIAS_MAGNITUDE_V.low, BIAS_MAGNITUDE_V.high) == (10.0, 1000.0)


@pytest.mark.parametrize("value", [10.0, 25, 40.0, np.float32(22.5)])
def test_values_inside_pass_through_as_float(value: object) -> None:
    assert TEMPERATURE_C.check("temperature_C", value) == pytest.approx(float(value))


@pytest.mark.parametrize(
    ("value", "problem"),
    [
        ("21", "is not a number"),
        (None, "is not a number"),
        (True, "is not a number"),
        (float("nan"), "is not a finite number"),
        (float("inf"), "is not a finite number"),
        (9.99, "is outside the allowed range 10 to 40 °C"),
        (40.01, "is outside the allowed range 10 to 40 °C"),
    ],
)
def test_bad_values_are_refused_by_name(value: object, problem: str) -> None:
    with pytest.raises(InputError) as caught:
        TEMPERATURE_C.check("temperature_C", value)
    assert caught.value.field == "temperature_C"
    assert problem in str(caught.value)


def test_arrays_name_the_first_offending_element() -> None:
    values = np.array([20.0, 21.0, 55.0, 70.0])
    with pytest.raises(InputError) as caught:
        TEMPERATURE_C.check("temperature_C", values)
    assert caught.value.field == "temperature_C[2]"
    assert caught.value.value == 55.0


def test_arrays_refuse_nan_by_index() -> None:
    with pytest.raises(InputError, match=r"pressure_kPa\[1\]"):
        as_number("pressure_kPa", [100.0, np.nan], "60 to 110 kPa")


def test_text_lists_are_not_numbers() -> None:
    with pytest.raises(InputError, match="is not a number"):
        as_number("routine_nC", ["a", "b"], "charges")
