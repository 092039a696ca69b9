"""k_pol: unity without a polarity effect, TRS-398 and TG-51 forms agree, signs are checked."""

from __future__ import annotations

import numpy as np
import pytest
from chargebook.corrections.errors import InputError
from chargebook.corrections.polarity import P_pol, k_pol
from hypothesis import given
from hypothesis import strategies as st

magnitudes = st.floats(0.1, 1000.0)
scales = st.floats(1e-3, 1e3)


def test_unity_without_polarity_effect() -> None:
    # Identity: |M+| = |M−| gives k_pol = 1 (TRS-398 formula).
    assert k_pol(20.0, -20.0) == 1.0
    assert k_pol(-20.0, 20.0) == 1.0


def test_hand_worked_value() -> None:
    # TRS-398 formula, worked by hand: (20.04 + 19.96)/(2·19.96) = 40/39.92 = 1.0020040...
    assert k_pol(19.96, -20.04) == pytest.approx(40.0 / 39.92, rel=1e-15)


@given(magnitudes, magnitudes, st.booleans())
def test_trs398_and_tg51_forms_agree(routine: float, opposite: float, positive: bool) -> None:
    # docs/physics.md: TG-51's |(M+ − M−)/(2M)| equals TRS-398's (|M+| + |M−|)/(2|M|).
    sign = 1.0 if positive else -1.0
    routine_nC, opposite_nC = sign * routine, -sign * opposite
    plus, minus = (routine_nC, opposite_nC) if positive else (opposite_nC, routine_nC)
    assert P_pol(plus, minus, routine_nC) == pytest.approx(
        k_pol(routine_nC, opposite_nC), rel=1e-12
    )


@given(magnitudes, magnitudes, scales)
def test_scale_invariant_in_charge(routine: float, opposite: float, scale: float) -> None:
    assert k_pol(routine * scale, -opposite * scale) == pytest.approx(
        k_pol(routine, -opposite), rel=1e-12
    )


def test_arrays() -> None:
    values = k_pol(np.array([20.0, -20.0]), np.array([-20.1, 20.1]))
    assert values == pytest.approx([20.05 / 20.0, 20.05 / 20.0])


def test_same_sign_readings_contradict_the_bias_reversal() -> None:
    with pytest.raises(InputError) as caught:
        k_pol(20.0, 20.1)
    assert caught.value.field == "opposite_nC"
    assert "same sign" in str(caught.value)


def test_tg51_form_refuses_readings_of_one_sign() -> None:
    # |(M+ − M−)/(2M)| equals TRS-398's k_pol only when M+ and M− have opposite signs; with
    # one sign it would give about 0 instead of about 1, so it is refused.
    with pytest.raises(InputError) as caught:
        P_pol(20.0, 20.1, 20.0)
    assert caught.value.field == "minus_nC"
    assert "same sign as plus_nC" in str(caught.value)


def test_zero_reading_carries_no_sign() -> None:
    with pytest.raises(InputError, match="routine_nC"):
        k_pol(0.0, -20.0)
