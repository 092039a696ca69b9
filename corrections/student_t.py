"""Student's t distribution and the coverage factor of an expanded uncertainty (JCGM 100:2008).

The coverage factor for a coverage probability p and ν effective degrees of freedom is the
two-sided quantile k = t_{(1+p)/2}(ν) (GUM G.3, G.4; Table G.2 tabulates it). ν_eff comes from
the Welch–Satterthwaite formula ν_eff = u_c⁴ / Σ (u_i⁴ / ν_i) (GUM G.4.1, equation G.2b), where
a Type B input known exactly enough has ν_i = ∞. ν_eff is used as computed, not truncated to an
integer: the t distribution is defined for any ν > 0, and truncation (GUM G.4.1 allows either)
would only round k up.

The cumulative distribution uses the regularized incomplete beta function,
P(|T| > t) = I_{ν/(ν+t²)}(ν/2, 1/2), evaluated by its continued fraction (modified Lentz). The
quantile is found by Newton's method on that tail (its derivative is twice the density), kept
within a bracket that bisection narrows whenever a Newton step would leave it, to far better than
the two decimals a coverage factor is quoted with. Pure Python and the standard library's
math: no I/O, no clock.
"""

from __future__ import annotations

import math
from collections.abc import Iterable

from chargebook.corrections.errors import InputError

#: The coverage probability used unless another is chosen (common practice).
DEFAULT_COVERAGE_PROBABILITY = 0.95
#: Above this many degrees of freedom the normal distribution is used (t differs by < 1e-6).
NORMAL_LIMIT_DOF = 1e7

_TINY = 1e-300
_EPSILON = 1e-15


def _beta_continued_fraction(x: float, a: float, b: float) -> float:
    """Return the continued fraction of I_x(a, b) by the modified Lentz method."""
    c, d = 1.0, 1.0 - (a + b) * x / (a + 1.0)
    d = 1.0 / (d if abs(d) > _TINY else _TINY)
    result = d
    for m in range(1, 10_000):
        for numerator in (
            m * (b - m) * x / ((a + 2 * m - 1.0) * (a + 2 * m)),
            -(a + m) * (a + b + m) * x / ((a + 2 * m) * (a + 2 * m + 1.0)),
        ):
            d = 1.0 + numerator * d
            d = 1.0 / (d if abs(d) > _TINY else _TINY)
            c = 1.0 + numerator / c
            c = c if abs(c) > _TINY else _TINY
            step = c * d
            result *= step
        if abs(step - 1.0) < _EPSILON:
            break
    return result


def regularized_incomplete_beta(x: float, a: float, b: float) -> float:
    """Return I_x(a, b) for 0 <= x <= 1 and a, b > 0."""
    if x <= 0.0:
        return 0.0
    if x >= 1.0:
        return 1.0
    log_front = (
        math.lgamma(a + b) - math.lgamma(a) - math.lgamma(b) + a * math.log(x) + b * math.log1p(-x)
    )
    front = math.exp(log_front)
    if x < (a + 1.0) / (a + b + 2.0):
        return front * _beta_continued_fraction(x, a, b) / a
    return 1.0 - front * _beta_continued_fraction(1.0 - x, b, a) / b


def two_sided_tail(t: float, dof: float) -> float:
    """Return P(|T| > |t|) for Student's t with ``dof`` degrees of freedom (∞: the normal)."""
    t = abs(t)
    if dof >= NORMAL_LIMIT_DOF:
        return math.erfc(t / math.sqrt(2.0))
    return regularized_incomplete_beta(dof / (dof + t * t), dof / 2.0, 0.5)


def _check_probability(coverage_probability: float) -> float:
    if (
        isinstance(coverage_probability, bool)
        or not isinstance(coverage_probability, int | float)
        or not 0.5 <= coverage_probability < 1.0
    ):
        raise InputError("coverage_probability", coverage_probability, "0.5 to below 1")
    return float(coverage_probability)


def coverage_factor(
    dof: float, coverage_probability: float = DEFAULT_COVERAGE_PROBABILITY
) -> float:
    """Return k = t_{(1+p)/2}(ν): the half-width, in standard uncertainties, of the interval
    that holds the coverage probability p of a t distribution with ν = ``dof`` (∞ allowed).

    Raises InputError for ν not above 0 or p outside [0.5, 1).
    """
    p = _check_probability(coverage_probability)
    if not dof > 0:
        raise InputError("degrees of freedom", dof, "above 0")
    tail = 1.0 - p
    low, high = 0.0, 1.0
    while two_sided_tail(high, dof) > tail:
        low, high = high, high * 2.0
    t = 0.5 * (low + high)
    for _ in range(200):
        excess = two_sided_tail(t, dof) - tail  # falls as t grows
        if excess > 0:
            low = t
        else:
            high = t
        newton = t + excess / (2.0 * _density(t, dof))  # d/dt P(|T| > t) = -2 f(t)
        following = newton if low <= newton <= high else 0.5 * (low + high)
        if abs(following - t) < 1e-13 * t or high - low < 1e-12 * high:
            return following
        t = following
    return t


def _density(t: float, dof: float) -> float:
    """Return the density f(t) of Student's t with ``dof`` degrees of freedom (∞: the normal)."""
    if dof >= NORMAL_LIMIT_DOF:
        return math.exp(-0.5 * t * t) / math.sqrt(2.0 * math.pi)
    log_density = (
        math.lgamma(0.5 * (dof + 1.0))
        - math.lgamma(0.5 * dof)
        - 0.5 * math.log(dof * math.pi)
        - 0.5 * (dof + 1.0) * math.log1p(t * t / dof)
    )
    return math.exp(log_density)


#: Degrees of freedom above which ν_eff is shown as "above 1000": k differs from the normal
#: distribution's by less than 0.1 % there.
SHOWN_DOF_LIMIT = 1000.0


def dof_text(dof: float | None) -> str:
    """Return degrees of freedom as shown to the operator: one decimal, or in words."""
    if dof is None:
        return "—"
    if math.isinf(dof):
        return "∞ (Type B only)"
    return f"{dof:.1f}" if dof < SHOWN_DOF_LIMIT else f"above {SHOWN_DOF_LIMIT:g}"


def welch_satterthwaite(contributions: Iterable[tuple[float, float]]) -> float:
    """Return ν_eff = u_c⁴ / Σ (u_i⁴ / ν_i) from (u_i, ν_i) pairs (GUM G.4.1, equation G.2b).

    ``u_i`` are the contributions (sensitivity × standard uncertainty, any one unit) and ν_i
    their degrees of freedom (``math.inf`` for an input known exactly enough). Returns ∞ when
    every contribution with a value has ν = ∞ or none has a value.
    """
    pairs = [(abs(u), dof) for u, dof in contributions]
    u_c_squared = sum(u * u for u, _ in pairs)
    denominator = sum(u**4 / dof for u, dof in pairs if math.isfinite(dof) and u > 0)
    if denominator == 0.0:
        return math.inf
    return u_c_squared**2 / denominator
