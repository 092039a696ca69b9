"""The two codes of practice chargebook follows: reference air conditions and printed symbols.

IAEA TRS-398 refers air density to 20 °C and 101.325 kPa; AAPM TG-51 to 22 °C and 101.33 kPa.
The constants are pinned per convention: the 101.325 versus 101.33 kPa difference alone shifts
k_TP by about 5e-5. Results are stored under one set of keys (``k_TP``, ``k_pol``, ...) and
printed with the chosen protocol's symbols (P_TP, P_pol, ... under TG-51).
"""

from __future__ import annotations

import enum
from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType

from chargebook.corrections.errors import InputError


class Convention(enum.StrEnum):
    """The code of practice whose reference conditions and symbols are used."""

    TRS398 = "trs398"
    TG51 = "tg51"


@dataclass(frozen=True)
class ConventionConstants:
    """Reference air conditions, the protocol's title and its symbol for each result key."""

    title: str
    reference_temperature_C: float
    reference_pressure_kPa: float
    symbols: Mapping[str, str]


_TRS398_SYMBOLS = {
    "k_TP": "k_TP",
    "k_h": "k_h",
    "k_pol": "k_pol",
    "k_s": "k_s",
    "k_elec": "k_elec",
    "N_Dw": "N_D,w,Q0",
    "k_Q": "k_Q,Q0",
    "M_raw": "M_raw",
    "M_corrected": "M_Q",
    "dose": "D_w,Q",
}

_TG51_SYMBOLS = {
    "k_TP": "P_TP",
    "k_h": "(k_h)",
    "k_pol": "P_pol",
    "k_s": "P_ion",
    "k_elec": "P_elec",
    "N_Dw": "N_D,w^60Co",
    "k_Q": "k_Q",
    "M_raw": "M_raw",
    "M_corrected": "M",
    "dose": "D_w^Q",
}

CONSTANTS: Mapping[Convention, ConventionConstants] = MappingProxyType(
    {
        # IAEA TRS-398 (2000; Rev. 1, 2024): reference air 20 °C, 101.325 kPa.
        Convention.TRS398: ConventionConstants(
            "IAEA TRS-398", 20.0, 101.325, MappingProxyType(_TRS398_SYMBOLS)
        ),
        # AAPM TG-51 (Almond et al. 1999): reference air 22 °C, 101.33 kPa.
        Convention.TG51: ConventionConstants(
            "AAPM TG-51", 22.0, 101.33, MappingProxyType(_TG51_SYMBOLS)
        ),
    }
)


def parse_convention(value: object) -> Convention:
    """Return the Convention named by ``value`` ("trs398" or "tg51"); raise InputError otherwise."""
    try:
        return (
            Convention(str(value).strip().lower()) if isinstance(value, str) else Convention(value)
        )
    except ValueError:
        raise InputError(
            "convention", value, "trs398 or tg51", "is not a known convention"
        ) from None


def constants(convention: Convention | str) -> ConventionConstants:
    """Return the pinned reference conditions and symbols of ``convention``."""
    return CONSTANTS[parse_convention(convention)]
