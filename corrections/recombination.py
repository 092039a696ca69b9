"""k_s (TG-51: P_ion), the correction for incomplete ion collection, by the two-voltage method.

V1 is the routine (higher) bias, V2 the reduced one, n = V1/V2, and M1/M2 the ratio of the mean
readings at the two biases (the "charge ratio"). Methods:

* pulsed and pulsed-scanned beams, TRS-398 (2000): k_s = a0 + a1 (M1/M2) + a2 (M1/M2)², coefficients
  tabulated for n = 2, 2.5, 3, 3.5, 4, 5 (TRS-398 (2000), the two-voltage table; values from
  memory, see docs/physics.md). A row is used only when n equals it to the setting resolution
  (``RATIO_RESOLUTION``, or one derived from the bias resolution): any other n is refused,
  never interpolated nor rounded to the nearest row (the caller may choose Boag's theory);
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
from chargebook.corrections.errors import InputError, parse_choice
from chargebook.corrections.limits import BIAS_MAGNITUDE_V, Number, Range, as_number, first_where


class Beam(enum.StrEnum):
    """The time structure of the beam, which decides how recombination is corrected."""

    PULSED = "pulsed"
    PULSED_SCANNED = "pulsed-scanned"
    CONTINUOUS = "continuous"


def parse_beam(value: object) -> Beam:
    """Return the Beam named by ``value``; raise InputError naming the allowed beams otherwise."""
    return parse_choice(Beam, "beam", value, "beam type")


#: TRS-398 (2000) two-voltage coefficients (a0, a1, a2) for pulsed beams, by n (from memory).
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

#: TRS-398 (2000) two-voltage coefficients (a0, a1, a2) for pulsed-scanned beams, by n (from
#: memory).
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

#: The resolution of a voltage ratio as set (dimensionless): n equals a tabulated row when it
#: is within this distance of it. Biases are set to a volt or better, so 300 V/100 V is 3 to far
#: better than 0.001; 198 V/100 V = 1.98 is not 2 (common practice).
RATIO_RESOLUTION = 0.001
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
    too_small = n < MINIMUM_VOLTAGE_RATIO - RATIO_RESOLUTION
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


def ratio_resolution(
    routine_V: float, reduced_V: float, bias_resolution_V: float | None = None
) -> float:
    """Return how closely n = |V1|/|V2| is known from the settings (dimensionless).

    With no bias resolution given, ``RATIO_RESOLUTION``. With the smallest bias step of the
    instrument in volts, each setting is within half a step of its nominal value, so n is
    within n·(δ/2)·(1/|V1| + 1/|V2|) of V1/V2; the larger of the two is returned.
    """
    if bias_resolution_V is None:
        return RATIO_RESOLUTION
    n = abs(routine_V) / abs(reduced_V)
    derived = n * 0.5 * bias_resolution_V * (1.0 / abs(routine_V) + 1.0 / abs(reduced_V))
    return max(RATIO_RESOLUTION, derived)


def tabulated_row(n: float, beam: Beam | str, resolution: float = RATIO_RESOLUTION) -> float | None:
    """Return the tabulated ratio that ``n`` equals to within ``resolution``, or None."""
    rows = np.array(list(_table(parse_beam(beam))))
    nearest = float(rows[np.argmin(np.abs(rows - n))])
    return nearest if abs(nearest - n) <= resolution else None


def tabulated_coefficients(
    n: object,
    beam: Beam | str,
    field: str = "voltage ratio routine_V/reduced_V",
    resolution: float = RATIO_RESOLUTION,
) -> tuple[Number, Number, Number]:
    """Return the TRS-398 (2000) coefficients (a0, a1, a2) for voltage ratio ``n`` and ``beam``.

    Raises InputError naming ``field`` when ``n`` is not a tabulated ratio to within
    ``resolution`` (the setting resolution of n): a ratio between rows is never rounded to one.
    """
    table = _table(parse_beam(beam))
    rows = np.array(list(table))
    coefficients = np.array(list(table.values()))
    ratio = np.asarray(as_number("voltage ratio", n, "a number"))
    distance = np.abs(ratio[..., None] - rows)
    nearest = np.argmin(distance, axis=-1)
    matched = np.take_along_axis(distance, nearest[..., None], axis=-1)[..., 0]
    unmatched = matched > resolution
    if np.any(unmatched):
        allowed = (
            ", ".join(f"{row:g}" for row in rows)
            + f" (TRS-398 (2000) table, to ±{resolution:g}; or choose Boag's theory with "
            'thresholds.recombination_off_table = "boag")'
        )
        raise InputError(
            field,
            first_where(ratio, unmatched),
            allowed,
            "is not a tabulated voltage ratio",
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
    """Return TRS-398 (2000)'s k_s = a0 + a1·(M1/M2) + a2·(M1/M2)² (dimensionless)."""
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


def _boag_u_unchecked(r: Number, n: Number, iterations: int = 80) -> Number:
    """Return Boag's u solving f(u)/f(n·u) = r without range checks (NaN where unreachable)."""
    n_arr, r_arr = np.broadcast_arrays(np.asarray(n, dtype=float), np.asarray(r, dtype=float))
    low = np.full(n_arr.shape, -30.0)
    high = np.full(n_arr.shape, 50.0)

    def excess(x: np.ndarray) -> np.ndarray:
        u = np.expm1(x) / n_arr
        return boag_efficiency(u) / boag_efficiency(n_arr * u) - r_arr

    unreachable = (excess(high) < 0) | (excess(low) > 0)
    for _ in range(iterations):
        middle = 0.5 * (low + high)
        above = excess(middle) > 0
        high = np.where(above, middle, high)
        low = np.where(above, low, middle)
    u = np.where(unreachable, np.nan, np.expm1(0.5 * (low + high)) / n_arr)
    return float(u) if u.ndim == 0 else u


def boag_u(charge_ratio: object, n: object, iterations: int = 80) -> Number:
    """Return Boag's u at the routine bias solving f(u)/f(n·u) = M1/M2, by vectorised bisection.

    The search runs over x = ln(1 + n·u), which maps u in (−1/n, ∞) onto the whole real line
    and keeps the bisection well conditioned; M1/M2 below 1 gives a small negative u (k_s < 1),
    matching the way the tabulated quadratics continue below k_s = 1.
    """
    n = as_number("voltage ratio", n, "a number")
    r = _charge_ratio(charge_ratio, n)
    u = _boag_u_unchecked(r, n, iterations)
    if np.any(np.isnan(u)):
        raise InputError("charge ratio M1/M2", r, "a ratio Boag's theory reaches for this n")
    return u


def k_s_boag(charge_ratio: object, n: object) -> Number:
    """Return k_s = 1/f(u) (dimensionless) from Boag's theory for a pulsed beam."""
    return 1.0 / boag_efficiency(boag_u(charge_ratio, n))


def _tabulated_slope(charge_ratio: Number, n: Number, beam: Beam) -> Number:
    _, a1, a2 = tabulated_coefficients(n, beam)
    return a1 + 2.0 * a2 * charge_ratio


def _tabulated_formula(r: Number, n: Number, beam: Beam) -> Number:
    a0, a1, a2 = tabulated_coefficients(n, beam)
    return a0 + a1 * r + a2 * r * r


#: Relative step of the central difference that gives dk_s/d(M1/M2) under Boag's theory.
_BOAG_SLOPE_STEP = 1e-6


def _boag_formula(r: Number, n: Number, beam: Beam) -> Number:
    return 1.0 / boag_efficiency(_boag_u_unchecked(r, n))


def _boag_slope(r: Number, n: Number, beam: Beam) -> Number:
    h = _BOAG_SLOPE_STEP * np.asarray(r, dtype=float)
    return (_boag_formula(r + h, n, beam) - _boag_formula(r - h, n, beam)) / (2.0 * h)


@dataclass(frozen=True)
class _Method:
    """One two-voltage method: its description, k_s(M1/M2, n, beam), dk_s/d(M1/M2), and the
    same formula without the input range checks (for Monte Carlo draws: NaN or inf, never an
    error, where the formula has no value)."""

    description: str
    value: Callable[[object, object, Beam], Number]
    slope: Callable[[Number, Number, Beam], Number]
    formula: Callable[[Number, Number, Beam], Number]


_CONTINUOUS = _Method(
    "continuous beam: (n² − 1)/(n² − M1/M2)",
    lambda r, n, beam: k_s_continuous(r, n),
    lambda r, n, beam: (n * n - 1.0) / (n * n - r) ** 2,
    lambda r, n, beam: (n * n - 1.0) / (n * n - r),
)
_LINEAR = _Method(
    "TG-51 linear: (1 − n)/(M1/M2 − n)",
    lambda r, n, beam: P_ion_linear(r, n),
    lambda r, n, beam: (n - 1.0) / (r - n) ** 2,
    lambda r, n, beam: (1.0 - n) / (r - n),
)
_QUADRATIC = _Method(
    "TRS-398 (2000) quadratic a0 + a1·M1/M2 + a2·(M1/M2)²",
    k_s_tabulated,
    _tabulated_slope,
    _tabulated_formula,
)
_BOAG = _Method(
    "Boag's theory 1/f(u), f(u) = ln(1 + u)/u, solved from M1/M2 and n",
    lambda r, n, beam: k_s_boag(r, n),
    _boag_slope,
    _boag_formula,
)


def _method(
    beam: Beam | str, convention: Convention | str, use_boag: bool = False
) -> tuple[Beam, _Method]:
    beam = parse_beam(beam)
    if beam is Beam.CONTINUOUS:
        return beam, _CONTINUOUS
    if use_boag:
        return beam, _BOAG
    if parse_convention(convention) is Convention.TG51:
        return beam, _LINEAR
    return beam, _QUADRATIC


def method(beam: Beam | str, convention: Convention | str, use_boag: bool = False) -> str:
    """Return, in words, the two-voltage method used for ``beam`` under ``convention``."""
    beam, chosen = _method(beam, convention, use_boag)
    if chosen is _CONTINUOUS:
        return chosen.description
    return f"{beam.value} beam, {chosen.description}"


def k_s(
    charge_ratio: object,
    n: object,
    beam: Beam | str = Beam.PULSED,
    convention: Convention | str = Convention.TRS398,
    use_boag: bool = False,
) -> Number:
    """Return k_s (TG-51: P_ion) by the method the protocol prescribes for ``beam``.

    Continuous beams: (n² − 1)/(n² − M1/M2) under both protocols; pulsed and pulsed-scanned
    beams: TRS-398 (2000)'s tabulated quadratic, or TG-51's linear form; with ``use_boag`` (the
    user's choice for a ratio off the table) Boag's theory for pulsed beams.
    """
    beam, chosen = _method(beam, convention, use_boag)
    return chosen.value(charge_ratio, n, beam)


def k_s_slope(
    charge_ratio: Number,
    n: Number,
    beam: Beam | str = Beam.PULSED,
    convention: Convention | str = Convention.TRS398,
    use_boag: bool = False,
) -> Number:
    """Return dk_s/d(M1/M2), the derivative of :func:`k_s` used in uncertainty propagation."""
    beam, chosen = _method(beam, convention, use_boag)
    return chosen.slope(charge_ratio, n, beam)


def k_s_unchecked(
    charge_ratio: Number,
    n: float,
    beam: Beam | str = Beam.PULSED,
    convention: Convention | str = Convention.TRS398,
    use_boag: bool = False,
) -> Number:
    """Return :func:`k_s` for arrays of draws without the charge-ratio range checks.

    For Monte Carlo draws only: a draw where the formula has no value gives NaN or inf, which
    the caller counts, instead of an error naming a random draw. ``n`` is the checked ratio.
    """
    beam, chosen = _method(beam, convention, use_boag)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        return chosen.formula(np.asarray(charge_ratio, dtype=float), n, beam)
