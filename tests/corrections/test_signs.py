"""One bias per reading set: the set's sign, and the reading that contradicts it."""

from __future__ import annotations

import numpy as np
import pytest
from chargebook.corrections.errors import InputError
from chargebook.corrections.signs import contradicting, set_sign, set_signs


def test_one_set_gives_its_sign() -> None:
    assert set_signs("routine_nC", np.array([14.7, 14.8])) == 1.0
    assert set_signs("routine_nC", np.array([-14.7, -14.8])) == -1.0


def test_rows_give_one_sign_each_and_ignore_padding() -> None:
    rows = np.array([[14.7, 14.8, np.nan], [-14.7, -14.8, -14.6]])
    assert set_signs("routine_nC", rows).tolist() == [1.0, -1.0]


@pytest.mark.parametrize(
    ("readings", "field", "value"),
    [
        ([14.7, -14.7, 14.7], "routine_nC[1]", -14.7),  # the majority sets the sign
        ([-14.7, 14.7], "routine_nC[1]", 14.7),  # a tie: the first reading sets it
        ([14.7, 0.0, 14.7], "routine_nC[1]", 0.0),  # zero carries no sign
    ],
)
def test_the_contradicting_reading_is_named(readings: list, field: str, value: float) -> None:
    with pytest.raises(InputError) as caught:
        set_signs("routine_nC", np.array(readings))
    assert (caught.value.field, caught.value.value) == (field, value)
    assert "contradicts the bias of its set" in str(caught.value)


def test_a_padded_row_names_row_and_column() -> None:
    rows = np.array([[14.7, 14.8, np.nan], [np.nan, -14.7, 14.7]])
    with pytest.raises(InputError) as caught:
        set_signs("reduced_nC", rows)
    # Row 1 is a tie (one each): its first present reading (−14.7) sets the sign.
    assert caught.value.field == "reduced_nC[1,2]"


@pytest.mark.parametrize(
    "readings",
    [
        [14.7, 14.8, 14.6],
        [14.7, -14.7, 14.7],
        [-14.7, 14.7],  # a tie: the first reading sets the sign
        [14.7, -14.7],
        [14.7, 0.0, 14.7],
        [0.0, 0.0],
        [-14.7, -14.8, 14.9, 14.7],
    ],
)
def test_the_flag_rule_and_the_refusal_rule_are_one_rule(readings: list) -> None:
    # What a display flags (contradicting) and what evaluate refuses (set_signs) must agree
    # reading for reading: the console once showed no flag where the results refused a reading.
    flagged = contradicting(np.array(readings)).tolist()
    try:
        set_signs("routine_nC", np.array(readings))
    except InputError as error:
        assert flagged.index(True) == int(error.field.removeprefix("routine_nC[")[:-1])
    else:
        assert not any(flagged)


def test_settling_readings_are_judged_against_the_readings_used_for_results() -> None:
    used = np.array([14.7, -14.7, 14.8])
    assert set_sign(used) == 1.0
    assert contradicting(np.array([-15.1, 14.7, -14.7, 14.8]), used).tolist() == [
        True,
        False,
        True,
        False,
    ]


def test_a_known_electrometer_convention_flags_a_set_of_the_wrong_sign() -> None:
    # Common practice: an electrometer's sign for a positive bias is fixed by its design.
    readings = np.array([-14.7, -14.8])
    assert not contradicting(readings).any()
    assert contradicting(readings, None, 300.0, 1.0).all()
    assert not contradicting(readings, None, -300.0, 1.0).any()


def test_an_empty_set_has_no_sign_and_flags_nothing() -> None:
    assert np.isnan(set_sign(np.array([])))
    assert contradicting(np.array([])).tolist() == []
