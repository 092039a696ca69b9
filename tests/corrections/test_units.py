"""Input unit conversions: pressure in kPa/hPa/mmHg, N_D,w in Gy/nC, Gy/C, cGy/nC."""

from __future__ import annotations

import pytest
from chargebook.corrections.errors import InputError
from chargebook.corrections.units import Conversion, N_Dw_Gy_per_nC, pressure_kPa


def test_standard_atmosphere_in_mmHg() -> None:
    # The conventional mmHg is 133.322387 Pa (docs/physics.md); 760 mmHg is one standard
    # atmosphere, 101.325 kPa, to 1.5e-7 relative (the torr is 101325/760 Pa exactly).
    assert pressure_kPa(760.0, "mmHg") == pytest.approx(101.325, rel=2e-7)
    assert pressure_kPa(750.0, "mmHg") == pytest.approx(750.0 * 0.133322387415, rel=1e-12)


def test_hPa_is_a_tenth_of_a_kPa() -> None:
    # SI prefixes: 1 hPa = 100 Pa = 0.1 kPa.
    assert pressure_kPa(1013.25, "hPa") == pytest.approx(101.325, rel=1e-12)


def test_pressure_range_is_checked_in_the_unit_entered() -> None:
    with pytest.raises(InputError) as caught:
        pressure_kPa(5000.0, "hPa")
    assert caught.value.field == "pressure_hPa"
    assert "600 to 1100 hPa" in str(caught.value)


def test_a_pressure_given_under_another_name_is_refused_under_that_name() -> None:
    # the daemon's environment.set takes "pressure" and "pressure_unit": name those, not kPa
    with pytest.raises(InputError) as caught:
        pressure_kPa(5000.0, "hPa", field="pressure")
    assert caught.value.field == "pressure"
    assert str(caught.value) == "pressure = 5000 is outside the allowed range 600 to 1100 hPa"
    with pytest.raises(InputError) as caught:
        pressure_kPa(1.0, "bar", field="pressure")
    assert caught.value.field == "pressure_unit"


def test_unknown_pressure_unit_is_refused() -> None:
    with pytest.raises(InputError, match="psi"):
        pressure_kPa(14.7, "psi")


@pytest.mark.parametrize(
    ("value", "unit", "expected"),
    [
        (0.0538, "Gy/nC", 0.0538),
        (5.38e7, "Gy/C", 0.0538),  # 1 nC = 1e-9 C (SI)
        (5.38, "cGy/nC", 0.0538),  # 1 cGy = 0.01 Gy (SI)
    ],
)
def test_calibration_coefficient_units(value: float, unit: str, expected: float) -> None:
    assert N_Dw_Gy_per_nC(value, unit) == pytest.approx(expected, rel=1e-12)


def test_negative_calibration_coefficient_is_refused() -> None:
    with pytest.raises(InputError) as caught:
        N_Dw_Gy_per_nC(-5.38e7, "Gy/C")
    assert caught.value.field == "N_Dw_Gy_per_C"
    assert "-5.38e+07" in str(caught.value)


def test_conversion_reads_as_the_operator_sees_it() -> None:
    conversion = Conversion("pressure", 1013.25, "hPa", 101.325, "kPa")
    assert conversion.text() == "pressure 1013.25 hPa = 101.325 kPa"
    assert conversion.to_dict()["text"] == conversion.text()
