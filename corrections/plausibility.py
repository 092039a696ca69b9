"""Plausibility flags: values inside the wide input ranges that still look like a unit slip.

The input ranges (see :mod:`chargebook.corrections.limits`) are wide on purpose, so a value
typed in the wrong unit can pass them: N_D,w copied in cGy/nC into the Gy/nC field gives a dose
per MU a hundred times too large; 760 typed as hPa gives k_TP = 1.34. When no expected output is
entered, nothing else would catch these. Each flag says what to check; none stops the
calculation. Bands are common practice, chosen wide so that a sound measurement never trips them
(reasons in docs/physics.md, "Plausibility").
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

from chargebook.corrections.errors import Flag
from chargebook.corrections.limits import Range

#: Dose per MU of a linac beam at or near reference conditions: machines are set to about
#: 1 cGy/MU at d_max, and depth, field and SSD move it within this band (common practice).
DOSE_PER_MU_CGY = Range(0.3, 3.0, "cGy/MU")
#: k_TP of a clinic below about 2000 m: 10–40 °C and 80–106 kPa give about 0.92 to 1.33; higher
#: clinics (Mexico City, La Paz) legitimately exceed 1.3 and the flag says so (common practice).
K_TP = Range(0.8, 1.3)
#: N_D,w above this (Gy/nC) belongs to a chamber of a few hundredths of a cm³; a Farmer-type
#: 0.6 cm³ chamber has about 0.05 Gy/nC (common practice).
N_DW_LARGE_GY_PER_NC = 1.0
#: A reading set's mean charge above this (nC) is far above what a reference chamber collects
#: for a few hundred MU (tens of nC; common practice): probably pC or another unit.
CHARGE_LARGE_NC = 1000.0
#: Pressure readings that are the standard atmosphere in a unit: as typed, with their unit.
COMMON_PRESSURES: tuple[tuple[float, str], ...] = (
    (760.0, "mmHg"),
    (1013.0, "hPa"),
    (1013.25, "hPa"),
    (101.3, "kPa"),
    (101.325, "kPa"),
)


@dataclass(frozen=True)
class Entered:
    """What the plausibility checks look at; None: not known."""

    pressure: tuple[float, str] | None = None
    N_Dw_Gy_per_nC: float | None = None
    k_TP: float | None = None
    dose_per_MU_cGy: float | None = None
    set_means_nC: Mapping[str, float] = field(default_factory=dict)


def _pressure_flags(pressure: tuple[float, str] | None) -> list[Flag]:
    if pressure is None:
        return []
    value, unit = pressure
    for common, its_unit in COMMON_PRESSURES:
        if value == common and unit != its_unit:
            return [
                Flag(
                    "pressure_unit_suspect",
                    f"The pressure was entered as {value:g} {unit}, but {common:g} is the "
                    f"standard atmosphere in {its_unit}. Check the barometer's unit and enter "
                    f"the reading as pressure_{its_unit} if that is what it shows.",
                )
            ]
    return []


def _band_flags(
    value: float | None, band: Range, code: str, words: Callable[[float], str]
) -> list[Flag]:
    """Return the flag ``code``, worded by ``words(value)``, when ``value`` is outside ``band``."""
    if value is None or band.low <= value <= band.high:
        return []
    return [Flag(code, words(value))]


def _k_TP_words(k_TP: float) -> str:
    return (
        f"k_TP = {k_TP:.4f} lies outside {K_TP.text()}, the band of clinics below about "
        "2000 m. Check the pressure's unit (hPa, kPa or mmHg) and the temperature's (°C); at a "
        "high-altitude clinic a value above 1.3 can be right."
    )


def _dose_per_MU_words(per_MU: float) -> str:
    return (
        f"The dose per MU is {per_MU:.4g} cGy/MU, outside {DOSE_PER_MU_CGY.text()}, the band "
        "of a linac beam at reference conditions. Check the unit of N_D,w (Gy/nC, not cGy/nC "
        "or Gy/C), the MU per reading, and the unit of the readings (nC)."
    )


def _N_Dw_flags(N_Dw: float | None) -> list[Flag]:
    if N_Dw is None or N_Dw <= N_DW_LARGE_GY_PER_NC:
        return []
    return [
        Flag(
            "N_Dw_unit_suspect",
            f"N_D,w = {N_Dw:g} Gy/nC is more than {N_DW_LARGE_GY_PER_NC:g} Gy/nC: right only "
            "for a chamber of a few hundredths of a cm³ (a 0.6 cm³ chamber has about 0.05 "
            "Gy/nC). Check the certificate's unit: if it gives cGy/nC, enter it as "
            "N_Dw_cGy_per_nC.",
        )
    ]


def _charge_flags(set_means_nC: Mapping[str, float]) -> list[Flag]:
    large = {key: mean for key, mean in set_means_nC.items() if abs(mean) > CHARGE_LARGE_NC}
    if not large:
        return []
    names = ", ".join(f"{key} {mean:.4g} nC" for key, mean in large.items())
    return [
        Flag(
            "charge_implausible",
            f"Mean charge above {CHARGE_LARGE_NC:g} nC ({names}): far more than a reference "
            "chamber collects for a few hundred MU. Check that the readings are in nC, not pC, "
            "and that the electrometer range was read correctly.",
        )
    ]


def flags(entered: Entered) -> list[Flag]:
    """Return every plausibility flag for ``entered``, each saying what to check."""
    return (
        _pressure_flags(entered.pressure)
        + _band_flags(entered.k_TP, K_TP, "k_TP_implausible", _k_TP_words)
        + _N_Dw_flags(entered.N_Dw_Gy_per_nC)
        + _band_flags(
            entered.dose_per_MU_cGy, DOSE_PER_MU_CGY, "dose_per_MU_implausible", _dose_per_MU_words
        )
        + _charge_flags(entered.set_means_nC)
    )
