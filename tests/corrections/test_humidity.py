"""k_h = 1 inside 20–80 % RH; humidity outside 0–100 % is refused."""

from __future__ import annotations

import numpy as np
import pytest
from chargebook.corrections.errors import InputError
from chargebook.corrections.humidity import humidity_in_band, k_h


@pytest.mark.parametrize("humidity", [20.0, 50.0, 80.0])
def test_unity_in_the_band(humidity: float) -> None:
    # k_h = 1 for 20–80 % RH with a chamber calibrated near 50 % (from memory, both protocols).
    assert k_h(humidity) == 1.0
    assert humidity_in_band(humidity)


def test_band_edges() -> None:
    flags = humidity_in_band(np.array([19.9, 20.0, 80.0, 80.1]))
    assert flags.tolist() == [False, True, True, False]


def test_arrays_give_arrays() -> None:
    assert k_h(np.array([30.0, 60.0])).tolist() == [1.0, 1.0]


@pytest.mark.parametrize("humidity", [-5.0, 120.0, "humid"])
def test_impossible_humidity_is_refused(humidity: object) -> None:
    with pytest.raises(InputError, match="humidity_pct"):
        k_h(humidity)
