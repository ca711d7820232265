"""Confidence intervals for proportions and Poisson rates.

Three intervals, each chosen for a reason the report can state in one line:

- Wilson score interval for proportions that are reported as estimates (cumulative incidence,
  sensitivity): it keeps close to nominal coverage at small counts and near 0 or 1, where the
  Wald interval collapses to zero width (Brown, Cai and DasGupta 2001, *Stat Sci* 16:101).
- Clopper-Pearson ("exact") interval, for readers who ask for a guaranteed-coverage interval; it
  is conservative.
- Garwood (1936) exact Poisson interval for event counts over person-time, from chi-square
  quantiles: ``L = chi2(a/2, 2k) / 2`` and ``U = chi2(1 - a/2, 2k + 2) / 2``.

All three return an :class:`Interval`. Degenerate inputs are handled exactly: ``x = 0`` gives a
lower limit of exactly 0 and ``x = n`` an upper limit of exactly 1. With no data (``n = 0`` or
zero exposure) there is no estimate, and every field is NaN rather than an exception, so that a
report can show an empty stratum as "not estimable" without special-casing the call.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from numbers import Integral, Real

from scipy import stats

__all__ = ["Interval", "clopper_pearson_interval", "poisson_exact_interval", "wilson_interval"]

_NAN = float("nan")


@dataclass(frozen=True, slots=True)
class Interval:
    """A point estimate with its two-sided confidence limits.

    Attributes:
        estimate: The point estimate (a proportion, or a rate per unit of exposure).
        low: The lower confidence limit.
        high: The upper confidence limit.
    """

    estimate: float
    low: float
    high: float


def _check_confidence(confidence: float) -> float:
    if not isinstance(confidence, Real) or not 0.0 < float(confidence) < 1.0:
        raise ValueError(f"confidence must lie strictly between 0 and 1, got {confidence!r}")
    return 1.0 - float(confidence)


def _check_count(name: str, value: int) -> int:
    if isinstance(value, bool) or not isinstance(value, Integral) or value < 0:
        raise ValueError(f"{name} must be a non-negative integer, got {value!r}")
    return int(value)


def _check_proportion_args(x: int, n: int, confidence: float) -> tuple[int, int, float]:
    alpha = _check_confidence(confidence)
    x = _check_count("x", x)
    n = _check_count("n", n)
    if x > n:
        raise ValueError(f"x must not exceed n, got x={x}, n={n}")
    return x, n, alpha


def wilson_interval(x: int, n: int, *, confidence: float = 0.95) -> Interval:
    """Wilson score interval for a binomial proportion ``x / n``.

    Used for every proportion the report shows as an estimate, because its coverage stays close
    to nominal for small ``n`` and for proportions near 0 or 1.

    Args:
        x: Number of successes (events).
        n: Number of trials (patients at risk).
        confidence: Two-sided confidence level.

    Returns:
        The proportion with its limits; all NaN when ``n == 0``.

    Raises:
        ValueError: If the counts are negative or not integers, ``x > n``, or ``confidence`` is
            not in (0, 1).

    Examples:
        >>> ci = wilson_interval(9, 100)
        >>> round(ci.low, 4), round(ci.high, 4)
        (0.0481, 0.1623)
        >>> wilson_interval(0, 50).low
        0.0
    """
    x, n, alpha = _check_proportion_args(x, n, confidence)
    if n == 0:
        return Interval(_NAN, _NAN, _NAN)
    z = float(stats.norm.ppf(1.0 - alpha / 2.0))
    p = x / n
    z2n = z * z / n
    centre = (p + z2n / 2.0) / (1.0 + z2n)
    half = z / (1.0 + z2n) * math.sqrt(p * (1.0 - p) / n + z * z / (4.0 * n * n))
    low = 0.0 if x == 0 else max(0.0, centre - half)
    high = 1.0 if x == n else min(1.0, centre + half)
    return Interval(p, low, high)


def clopper_pearson_interval(x: int, n: int, *, confidence: float = 0.95) -> Interval:
    """Clopper-Pearson (exact, beta quantile) interval for a binomial proportion.

    Offered for readers who want an interval with guaranteed coverage of at least the nominal
    level; it is wider than Wilson's.

    Args:
        x: Number of successes.
        n: Number of trials.
        confidence: Two-sided confidence level.

    Returns:
        The proportion with its limits; all NaN when ``n == 0``.

    Raises:
        ValueError: As for :func:`wilson_interval`.

    Examples:
        >>> ci = clopper_pearson_interval(0, 50)
        >>> ci.low, round(ci.high, 4)
        (0.0, 0.0711)
    """
    x, n, alpha = _check_proportion_args(x, n, confidence)
    if n == 0:
        return Interval(_NAN, _NAN, _NAN)
    low = 0.0 if x == 0 else float(stats.beta.ppf(alpha / 2.0, x, n - x + 1))
    high = 1.0 if x == n else float(stats.beta.ppf(1.0 - alpha / 2.0, x + 1, n - x))
    return Interval(x / n, low, high)


def poisson_exact_interval(k: int, exposure: float, *, confidence: float = 0.95) -> Interval:
    """Exact (Garwood 1936) interval for a Poisson rate ``k / exposure``.

    The limits for the expected count are chi-square quantiles, ``chi2(a/2, 2k) / 2`` and
    ``chi2(1 - a/2, 2k + 2) / 2``, divided here by the exposure, so the result is a rate per
    unit of exposure (multiply by 1000 for a rate per 1,000 person-years when exposure is in
    person-years). With ``k = 0`` the lower limit is exactly 0.

    Args:
        k: Number of events.
        exposure: Total person-time, in any unit; must be non-negative.
        confidence: Two-sided confidence level.

    Returns:
        The rate with its limits; all NaN when ``exposure == 0``.

    Raises:
        ValueError: If ``k`` is not a non-negative integer, ``exposure`` is negative or not
            finite, ``k > 0`` with zero exposure, or ``confidence`` is not in (0, 1).

    Examples:
        >>> ci = poisson_exact_interval(12, 1000.0)
        >>> round(ci.low * 1000, 4), round(ci.high * 1000, 4)
        (6.2006, 20.9616)
    """
    alpha = _check_confidence(confidence)
    k = _check_count("k", k)
    if not isinstance(exposure, Real) or not math.isfinite(exposure) or exposure < 0:
        raise ValueError(f"exposure must be a finite non-negative number, got {exposure!r}")
    exposure = float(exposure)
    if exposure == 0.0:
        if k > 0:
            raise ValueError(f"{k} events cannot occur in zero exposure")
        return Interval(_NAN, _NAN, _NAN)
    low = 0.0 if k == 0 else float(stats.chi2.ppf(alpha / 2.0, 2 * k)) / 2.0
    high = float(stats.chi2.ppf(1.0 - alpha / 2.0, 2 * k + 2)) / 2.0
    return Interval(k / exposure, low / exposure, high / exposure)
