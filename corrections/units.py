"""Unit conversions of inputs, done once and recorded so that they can be shown.

Pressure: 1 hPa = 0.1 kPa; 1 mmHg = 0.133322387415 kPa, the conventional millimetre of mercury,
defined as the pressure of 1 mm of mercury of density 13 595.1 kg/m³ under standard gravity
9.806 65 m/s² (so 760 mmHg is the standard atmosphere 101.325 kPa to within 1.5e-7; the torr,
101325/760 Pa, differs from the mmHg by that much). Calibration coefficient N_D,w:
1 Gy/C = 1e-9 Gy/nC; 1 cGy/nC = 0.01 Gy/nC.
"""

from __future__ import annotations

from dataclasses import dataclass
from types import MappingProxyType

from chargebook.corrections.errors import InputError
from chargebook.corrections.limits import N_DW_GY_PER_NC, PRESSURE_KPA, Number

KPA_PER_HPA = 0.1
KPA_PER_MMHG = 13595.1 * 9.80665 * 1e-3 * 1e-3  # kg/m³ · m/s² · m → Pa → kPa
GY_PER_NC_PER_GY_PER_C = 1e-9
GY_PER_NC_PER_CGY_PER_NC = 0.01

#: Pressure unit -> kPa per unit.
PRESSURE_UNITS = MappingProxyType({"kPa": 1.0, "hPa": KPA_PER_HPA, "mmHg": KPA_PER_MMHG})
#: Calibration coefficient unit -> Gy/nC per unit.
N_DW_UNITS = MappingProxyType(
    {"Gy/nC": 1.0, "Gy/C": GY_PER_NC_PER_GY_PER_C, "cGy/nC": GY_PER_NC_PER_CGY_PER_NC}
)


@dataclass(frozen=True)
class Conversion:
    """One input converted to the unit the library works in, kept to be shown to the operator."""

    quantity: str
    value: float
    unit: str
    converted_value: float
    converted_unit: str

    def text(self) -> str:
        """Return the conversion in words, e.g. "pressure 1013.25 hPa = 101.325 kPa"."""
        return (
            f"{self.quantity} {self.value:g} {self.unit} = "
            f"{self.converted_value:.6g} {self.converted_unit}"
        )

    def to_dict(self) -> dict[str, object]:
        """Return the conversion as JSON-ready plain types."""
        return {
            "quantity": self.quantity,
            "value": self.value,
            "unit": self.unit,
            "converted_value": self.converted_value,
            "converted_unit": self.converted_unit,
            "text": self.text(),
        }


def _factor(table: MappingProxyType, unit: str, field: str) -> float:
    try:
        return table[unit]
    except KeyError:
        allowed = ", ".join(table)
        raise InputError(field, unit, allowed, "is not a known unit") from None


def pressure_kPa(value: object, unit: str = "kPa", field: str | None = None) -> Number:
    """Return the pressure in kPa from ``value`` in kPa, hPa or mmHg, checked 60–110 kPa.

    The range is checked in the unit given, so the error names the field as entered:
    ``field`` when given (``pressure = 5000 is outside the allowed range 600 to 1100 hPa``, its
    unit then ``<field>_unit``), else the unit-suffixed name a worksheet key has
    (``pressure_hPa = 5000 ...``).
    """
    factor = _factor(PRESSURE_UNITS, unit, f"{field}_unit" if field else "pressure unit")
    in_unit = PRESSURE_KPA.scaled(1.0 / factor, unit)
    return in_unit.check(field or f"pressure_{unit}", value) * factor


def N_Dw_Gy_per_nC(value: object, unit: str = "Gy/nC") -> Number:
    """Return the calibration coefficient N_D,w in Gy/nC from Gy/nC, Gy/C or cGy/nC, checked."""
    factor = _factor(N_DW_UNITS, unit, "N_Dw unit")
    field = "N_Dw_" + unit.replace("/", "_per_")
    return N_DW_GY_PER_NC.scaled(1.0 / factor, unit).check(field, value) * factor
