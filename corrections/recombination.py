"""k_s (TG-51: P_ion), the correction for incomplete ion collection, by the two-voltage method.

V1 is the routine (higher) bias, V2 the reduced one, n = V1/V2, and M1/M2 the ratio of the mean
readings at the two biases (the "charge ratio"). Methods:

* pulsed and pulsed-scanned beams, TRS-398: k_s = a0 + a1 (M1/M2) + a2 (M1/M2)², coefficients
  tabulated for n = 2, 2.5, 3, 3.5, 4, 5 (REFERENCE.md, from memory). A ratio n not in the table
  is refused, never interpolated;
* pulsed beams, TG-51: P_ion = (1 − n) / (M1/M2 − n) (the linear approximation);
* continuous beams (60Co), both protocols: k_s = (n² − 1) / (n² − M1/M2);
* Boag's theory for pulsed beams, solved numerically: collection efficiency f(u) = ln(1 + u)/u,
  u ∝ dose per pulse / V; solve f(u)/f(n·u) = M1/M2 for u, then k_s = 1/f(u). The tabulated
  quadratics are fits to this theory.

Every function takes scalars or numpy arrays and broadcasts.
"""

from __future__ import annotations

import enum
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np
from chargebook.corrections.conventions import Convention, parse_convention
from chargebook.corrections.errors import InputError
from chargebook.corrections.limits import BIAS_MAGNITUDE_V, Number, Range, as_number, first_where


class Beam(enum.StrEnum):
    """The time structure of the beam, which decides how recombination is corrected."""

    PULSED = "pulsed"
    PULSED_SCANNED = "pulsed-scanned"
    CONTINUOUS = "continuous"


def parse_beam(value: object) -> Beam:
    """Return the Beam named by ``value``; raise InputError naming the allowed beams otherwise."""
    try:
        return Beam(value.strip().lower() if isinstance(value, str) else value)
    except ValueError:
        allowed = ", ".join(beam.value for beam in Beam)
        raise InputError("beam", value, allowed, "is not a known beam type") from None


#: TRS-398 two-voltage coefficients (a0, a1, a2) for pulsed beams, by n (from memory).
PULSED_COEFFICIENTS: Mapping[float, tuple[float, float, float]] = MappingProxyType(
    {
        2.0: (2.337, -3.636, 2.299),
        2.5: (1.474, -1.587, 1.114),
        3.0: (1.198, -0.875, 0.677),
        3.5: (1.080, -0.542, 0.463),
        4.0: (1.022, -0.363, 0.341),
        5.0: (0.975, -0.188, 0.214),
    }
)

#: TRS-398 two-voltage coefficients (a0, a1, a2) for pulsed-scanned beams, by n (from memory).
PULSED_SCANNED_COEFFICIENTS: Mapping[float, tuple[float, float, float]] = MappingProxyType(
    {
        2.0: (4.711, -8.242, 4.533),
        2.5: (2.719, -3.977, 2.261),
        3.0: (2.001, -2.402, 1.404),
        3.5: (1.665, -1.647, 0.984),
        4.0: (1.468, -1.200, 0.734),
        5.0: (1.279, -0.750, 0.474),
    }
)

#: A measured n matches a tabulated row when within this absolute distance (e.g. 400 V/133 V).
RATIO_MATCH_TOLERANCE = 0.02
#: The smallest voltage ratio accepted by any method (TG-51 asks for n >= 2; from memory).
MINIMUM_VOLTAGE_RATIO = 2.0
#: Plausible charge ratios M1/M2: below 0.95 or above 2 the sets were almost surely mixed up.
CHARGE_RATIO = Range(0.95, 2.0)


def voltage_ratio(
    routine_V: object,
    reduced_V: object,
    *,
    fields: tuple[str, str] = ("routine_V", "reduced_V"),
) -> Number:
    """Return n = |V1|/|V2| (dimensionless) from the signed routine bias and the reduced bias (V).

    The reduced bias may be given as a magnitude or signed; if signed it must have the routine
    polarity. Raises InputError for a bias magnitude outside 10–1000 V, a reduced bias of the
    other polarity, or n below 2. ``fields`` names the two inputs in error messages.
    """
    routine_field, reduced_field = fields
    allowed = f"±{BIAS_MAGNITUDE_V.text()}"
    V1 = as_number(routine_field, routine_V, allowed)
    V2 = as_number(reduced_field, reduced_V, allowed)
    BIAS_MAGNITUDE_V.check(f"|{routine_field}|", np.abs(V1))
    BIAS_MAGNITUDE_V.check(f"|{reduced_field}|", np.abs(V2))
    opposite = (V2 < 0) & (V1 > 0)
    if np.any(opposite):
        raise InputError(
            reduced_field,
            first_where(V2, opposite),
            "a magnitude, or a bias of the routine polarity",
            f"has the opposite polarity to {routine_field}",
        )
    n = np.abs(V1) / np.abs(V2)
    too_small = n < MINIMUM_VOLTAGE_RATIO - RATIO_MATCH_TOLERANCE
    if np.any(too_small):
        raise InputError(
            f"voltage ratio {routine_field}/{reduced_field}",
            first_where(n, too_small),
            f"{MINIMUM_VOLTAGE_RATIO:g} or more",
        )
    return n


def _table(beam: Beam) -> Mapping[float, tuple[float, float, float]]:
    if beam is Beam.PULSED:
        return PULSED_COEFFICIENTS
    if beam is Beam.PULSED_SCANNED:
        return PULSED_SCANNED_COEFFICIENTS
    raise InputError("beam", beam.value, "pulsed or pulsed-scanned", "has no tabulated quadratic")


def tabulated_coefficients(
    n: object, beam: Beam | str, field: str = "voltage ratio routine_V/reduced_V"
) -> tuple[Number, Number, Number]:
    """Return the TRS-398 coefficients (a0, a1, a2) for voltage ratio ``n`` and ``beam``.

    Raises InputError naming ``field`` when ``n`` is not within 0.02 of a tabulated ratio.
    """
    table = _table(parse_beam(beam))
    rows = np.array(list(table))
    coefficients = np.array(list(table.values()))
    ratio = np.asarray(as_number("voltage ratio", n, "a number"))
    distance = np.abs(ratio[..., None] - rows)
    nearest = np.argmin(distance, axis=-1)
    matched = np.take_along_axis(distance, nearest[..., None], axis=-1)[..., 0]
    unmatched = matched > RATIO_MATCH_TOLERANCE
    if np.any(unmatched):
        allowed = ", ".join(f"{row:g}" for row in rows) + " (TRS-398 table, ±0.02)"
        raise InputError(
            field,
            first_where(ratio, unmatched),
            allowed,
            "is not in the table",
        )
    a = coefficients[nearest]
    if a.ndim == 1:
        return float(a[0]), float(a[1]), float(a[2])
    return a[..., 0], a[..., 1], a[..., 2]


def _charge_ratio(charge_ratio: object, n: Number) -> Number:
    ratio = CHARGE_RATIO.check("charge ratio M1/M2", charge_ratio)
    at_or_above = ratio >= n
    if np.any(at_or_above):
        shown = first_where(ratio, at_or_above)
        raise InputError("charge ratio M1/M2", shown, "below the voltage ratio n")
    return ratio


def k_s_tabulated(charge_ratio: object, n: object, beam: Beam | str = Beam.PULSED) -> Number:
    """Return TRS-398's k_s = a0 + a1·(M1/M2) + a2·(M1/M2)² (dimensionless)."""
    a0, a1, a2 = tabulated_coefficients(n, beam)
    r = _charge_ratio(charge_ratio, np.asarray(n))
    return a0 + a1 * r + a2 * r * r


def P_ion_linear(charge_ratio: object, n: object) -> Number:
    """Return TG-51's P_ion = (1 − n)/(M1/M2 − n) (dimensionless) for pulsed beams."""
    n = as_number("voltage ratio", n, "a number")
    r = _charge_ratio(charge_ratio, n)
    return (1.0 - n) / (r - n)


def k_s_continuous(charge_ratio: object, n: object) -> Number:
    """Return k_s = (n² − 1)/(n² − M1/M2) (dimensionless) for continuous beams (both protocols)."""
    n = as_number("voltage ratio", n, "a number")
    r = _charge_ratio(charge_ratio, n)
    return (n * n - 1.0) / (n * n - r)


def boag_efficiency(u: Number) -> Number:
    """Return Boag's collection efficiency f(u) = ln(1 + u)/u for a pulsed beam (f(0) = 1)."""
    u = np.asarray(u, dtype=float)
    small = np.abs(u) < 1e-6
    safe = np.where(small, 1.0, u)
    series = 1.0 - u / 2.0 + u * u / 3.0 - u * u * u / 4.0
    result = np.where(small, series, np.log1p(safe) / safe)
    return float(result) if result.ndim == 0 else result


def boag_u(charge_ratio: object, n: object, iterations: int = 80) -> Number:
    """Return Boag's u at the routine bias solving f(u)/f(n·u) = M1/M2, by vectorised bisection.

    The search runs over x = ln(1 + n·u), which maps u in (−1/n, ∞) onto the whole real line
    and keeps the bisection well conditioned; M1/M2 below 1 gives a small negative u (k_s < 1),
    matching the way the tabulated quadratics continue below k_s = 1.
    """
    n = as_number("voltage ratio", n, "a number")
    r = _charge_ratio(charge_ratio, n)
    n_arr, r_arr = np.broadcast_arrays(np.asarray(n, dtype=float), np.asarray(r, dtype=float))
    low = np.full(n_arr.shape, -30.0)
    high = np.full(n_arr.shape, 50.0)

    def excess(x: np.ndarray) -> np.ndarray:
        u = np.expm1(x) / n_arr
        return boag_efficiency(u) / boag_efficiency(n_arr * u) - r_arr

    if np.any(excess(high) < 0):
        raise InputError("charge ratio M1/M2", r, "a ratio Boag's theory reaches for this n")
    for _ in range(iterations):
        middle = 0.5 * (low + high)
        above = excess(middle) > 0
        high = np.where(above, middle, high)
        low = np.where(above, low, middle)
    u = np.expm1(0.5 * (low + high)) / n_arr
    return float(u) if u.ndim == 0 else u


def k_s_boag(charge_ratio: object, n: object) -> Number:
    """Return k_s = 1/f(u) (dimensionless) from Boag's theory for a pulsed beam."""
    return 1.0 / boag_efficiency(boag_u(charge_ratio, n))


def _tabulated_slope(charge_ratio: Number, n: Number, beam: Beam) -> Number:
    _, a1, a2 = tabulated_coefficients(n, beam)
    return a1 + 2.0 * a2 * charge_ratio


@dataclass(frozen=True)
class _Method:
    """One two-voltage method: its description, k_s(M1/M2, n, beam) and dk_s/d(M1/M2)."""

    description: str
    value: Callable[[object, object, Beam], Number]
    slope: Callable[[Number, Number, Beam], Number]


_CONTINUOUS = _Method(
    "continuous beam: (n² − 1)/(n² − M1/M2)",
    lambda r, n, beam: k_s_continuous(r, n),
    lambda r, n, beam: (n * n - 1.0) / (n * n - r) ** 2,
)
_LINEAR = _Method(
    "TG-51 linear: (1 − n)/(M1/M2 − n)",
    lambda r, n, beam: P_ion_linear(r, n),
    lambda r, n, beam: (n - 1.0) / (r - n) ** 2,
)
_QUADRATIC = _Method(
    "TRS-398 quadratic a0 + a1·M1/M2 + a2·(M1/M2)²",
    k_s_tabulated,
    _tabulated_slope,
)


def _method(beam: Beam | str, convention: Convention | str) -> tuple[Beam, _Method]:
    beam = parse_beam(beam)
    if beam is Beam.CONTINUOUS:
        return beam, _CONTINUOUS
    if parse_convention(convention) is Convention.TG51:
        return beam, _LINEAR
    return beam, _QUADRATIC


def method(beam: Beam | str, convention: Convention | str) -> str:
    """Return, in words, the two-voltage method used for ``beam`` under ``convention``."""
    beam, chosen = _method(beam, convention)
    if chosen is _CONTINUOUS:
        return chosen.description
    return f"{beam.value} beam, {chosen.description}"


def k_s(
    charge_ratio: object,
    n: object,
    beam: Beam | str = Beam.PULSED,
    convention: Convention | str = Convention.TRS398,
) -> Number:
    """Return k_s (TG-51: P_ion) by the method the protocol prescribes for ``beam``.

    Continuous beams: (n² − 1)/(n² − M1/M2) under both protocols; pulsed and pulsed-scanned
    beams: TRS-398's tabulated quadratic, or TG-51's linear form.
    """
    beam, chosen = _method(beam, convention)
    return chosen.value(charge_ratio, n, beam)


def k_s_slope(
    charge_ratio: Number,
    n: Number,
    beam: Beam | str = Beam.PULSED,
    convention: Convention | str = Convention.TRS398,
) -> Number:
    """Return dk_s/d(M1/M2), the derivative of :func:`k_s` used in uncertainty propagation."""
    beam, chosen = _method(beam, convention)
    return chosen.slope(charge_ratio, n, beam)
