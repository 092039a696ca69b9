"""k_TP (TG-51: P_TP), the air-density correction of a vented chamber's reading.

    k_TP = ((273.2 + T) / (273.2 + T0)) · (P0 / P)

T, T0 in °C and P, P0 in kPa; (T0, P0) are the convention's reference conditions (TRS-398:
20 °C, 101.325 kPa; TG-51: 22 °C, 101.33 kPa). Both protocols write the kelvin offset as 273.2,
and so does this module by default. The exact 273.15 gives a slightly different ratio: the
relative difference is (T0 − T)·0.05 / ((273.2 + T0)(273.15 + T)), below 1e-6 within 1.5 °C of T0
and up to about 1.1e-5 at the ends of the accepted 10–40 °C (so 0.001 % at worst, far inside a
thermometer's uncertainty). ``kelvin_offset=273.15`` reproduces a worked example that used it.
"""

from __future__ import annotations

from chargebook.corrections.conventions import Convention, constants
from chargebook.corrections.limits import TEMPERATURE_C, Number
from chargebook.corrections.units import pressure_kPa as pressure_in_kPa

#: The kelvin offset as both protocols print it (the exact 273.15 shifts k_TP by at most about
#: 1.1e-5 relative over 10–40 °C; see the module docstring).
KELVIN_OFFSET_PROTOCOL = 273.2
#: The exact offset between the Celsius and the kelvin scales (SI).
KELVIN_OFFSET_EXACT = 273.15


def k_TP(
    temperature_C: object,
    pressure_kPa: object,
    convention: Convention | str = Convention.TRS398,
    *,
    reference_temperature_C: float | None = None,
    reference_pressure_kPa: float | None = None,
    kelvin_offset: float = KELVIN_OFFSET_PROTOCOL,
    pressure_unit: str = "kPa",
) -> Number:
    """Return k_TP (dimensionless) for air at ``temperature_C`` (°C) and ``pressure_kPa``.

    The pressure is in kPa unless ``pressure_unit`` says "hPa" or "mmHg" (1 mmHg = 0.133322387
    kPa, the conventional millimetre of mercury); it is converted once and checked in the unit
    given. Scalars or numpy arrays broadcast. The reference conditions come from ``convention``
    unless given explicitly (to reproduce a published worked example with other constants).
    Raises InputError for a temperature outside 10–40 °C or a pressure outside 60–110 kPa.
    """
    reference = constants(convention)
    T0 = (
        reference.reference_temperature_C
        if reference_temperature_C is None
        else reference_temperature_C
    )
    P0 = (
        reference.reference_pressure_kPa
        if reference_pressure_kPa is None
        else reference_pressure_kPa
    )
    T = TEMPERATURE_C.check("temperature_C", temperature_C)
    P = pressure_in_kPa(pressure_kPa, pressure_unit)
    return ((kelvin_offset + T) / (kelvin_offset + T0)) * (P0 / P)


def k_TP_relative_sensitivity(
    temperature_C: Number, pressure_kPa: Number, kelvin_offset: float = KELVIN_OFFSET_PROTOCOL
) -> tuple[Number, Number]:
    """Return (∂k_TP/∂T / k_TP in 1/°C, ∂k_TP/∂P / k_TP in 1/kPa) for uncertainty propagation."""
    return 1.0 / (kelvin_offset + temperature_C), -1.0 / pressure_kPa
