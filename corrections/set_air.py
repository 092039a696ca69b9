"""Air density per reading set: each set's mean referred to reference air before it is compared.

k_pol and k_s are ratios of set means. When the temperature or pressure changed between the sets
(within the limits that raise no flag), the sets were taken at different air densities and a
ratio of raw means carries the change. Each set's mean is therefore corrected with the k_TP of
the environment in force when that set was taken, and the ratios are formed from the corrected
means; the routine set's own k_TP is the k_TP of the result. Formula: TRS-398 k_TP (see
:mod:`chargebook.corrections.air_density`); the rule is explained in ``docs/physics.md``.

A set's environment is its own :class:`SetEnvironment` when one is given, else the session-wide
temperature and pressure. A ratio needs both sets' k_TP: the opposite or reduced-bias mean is
multiplied by k_TP(set) / k_TP(routine), which is exactly 1 when both sets share their air.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from chargebook.corrections import limits
from chargebook.corrections.air_density import k_TP as k_TP_of
from chargebook.corrections.conventions import Convention
from chargebook.corrections.errors import InputError

#: The source of a set's air when the set has no entry of its own.
SESSION_WIDE = "the session-wide entry"


@dataclass(frozen=True)
class SetEnvironment:
    """The air while one set was taken: temperature (°C), pressure (kPa), and its provenance.

    ``source`` says in words where the values come from (for example "entry 2", or a worksheet
    table); ``entry`` is the entry's position (from 1) in a recorded session's environment
    log, None otherwise. The evaluation shows both beside the set's k_TP.
    """

    temperature_C: float
    pressure_kPa: float
    source: str = ""
    entry: int | None = None


def check_set_environments(
    environments: Mapping[str, SetEnvironment], keys: tuple[str, ...]
) -> dict[str, SetEnvironment]:
    """Return the per-set environments after range checks; InputError names the set and field.

    Keys must be set names (``keys``); temperatures 10–40 °C, pressures 60–110 kPa (common
    practice, the plausible ranges of :mod:`chargebook.corrections.limits`).
    """
    checked: dict[str, SetEnvironment] = {}
    for key, entry in environments.items():
        if key not in keys:
            raise InputError("set_environments", key, "one of " + ", ".join(keys), "is not a set")
        name = f"set_environments.{key}"
        checked[key] = SetEnvironment(
            float(limits.TEMPERATURE_C.check(f"{name}.temperature_C", entry.temperature_C)),
            float(limits.PRESSURE_KPA.check(f"{name}.pressure_kPa", entry.pressure_kPa)),
            str(entry.source),
            entry.entry,
        )
    return checked


def environment_of(
    key: str,
    own: Mapping[str, SetEnvironment],
    temperature_C: float | None,
    pressure_kPa: float | None,
) -> SetEnvironment | None:
    """Return the environment a set was taken in: its own entry, else the session-wide one."""
    if key in own:
        return own[key]
    if temperature_C is None or pressure_kPa is None:
        return None
    return SetEnvironment(temperature_C, pressure_kPa, SESSION_WIDE)


def set_k_TP(environment: SetEnvironment | None, convention: Convention) -> float | None:
    """Return the k_TP (dimensionless) of one set's air, or None when its air is unknown."""
    if environment is None:
        return None
    return float(k_TP_of(environment.temperature_C, environment.pressure_kPa, convention))


def air_scale(k_TP_set: float | None, k_TP_routine: float | None) -> float:
    """Return k_TP(set) / k_TP(routine): the factor that refers a set's mean to the routine air.

    Exactly 1.0 when the two are equal or either is unknown (then no air-density correction
    between the sets is possible, and the ratio of raw means is the best there is).
    """
    if k_TP_set is None or k_TP_routine is None or k_TP_set == k_TP_routine:
        return 1.0
    return k_TP_set / k_TP_routine
