"""Rates from person-time: band-specific, crude, directly standardised and indirectly (SMR).

Every function takes events and person-time already summed by band (the caller groups
``persontime.parquet``), so this module knows nothing of files or engines:

- A band-specific or crude rate is events over person-years with the exact Poisson (Garwood)
  interval of :func:`pipeline.stats.poisson_exact_interval`, the same one the incidence table
  uses; there is one implementation of it.
- A directly standardised rate (DSR) weights the band-specific rates by a standard population's
  share in each band, with the gamma interval of Fay and Feuer (1997, *Stat Med* 16:791); the
  formula is in :func:`direct_standardised_rate`.
- An indirectly standardised ratio (SMR) compares the observed events with those expected from a
  reference table of rates by band; the expected count is treated as fixed and the observed as
  Poisson, so its interval is the exact Poisson interval of the observed count divided by the
  expected one.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import stats

from pipeline.stats._intervals import Interval, _check_confidence, poisson_exact_interval

__all__ = [
    "StandardisedRatio",
    "band_rates",
    "crude_rate",
    "direct_standardised_rate",
    "standardised_ratio",
]


@dataclass(frozen=True, slots=True)
class StandardisedRatio:
    """Observed against expected events (indirect standardisation).

    Attributes:
        observed: Events in the study population.
        expected: Events expected at the reference rates over the study's person-time.
        ratio: ``observed / expected`` (NaN when nothing is expected).
        low: Lower exact limit.
        high: Upper exact limit.
    """

    observed: int
    expected: float
    ratio: float
    low: float
    high: float


def _per(per: float) -> float:
    if not (isinstance(per, (int, float)) and math.isfinite(per) and per > 0):
        raise ValueError(f"per must be a positive number, got {per!r}")
    return float(per)


def _scaled(ci: Interval, per: float) -> Interval:
    return Interval(ci.estimate * per, ci.low * per, ci.high * per)


def band_rates(
    events: Sequence[int],
    person_years: Sequence[float],
    *,
    per: float = 1000.0,
    confidence: float = 0.95,
) -> list[Interval]:
    """The rate of each band per ``per`` person-years, each with its exact Poisson interval.

    Args:
        events: Events per band.
        person_years: Person-years per band, in the same order.
        per: Person-years in the rate unit (1000: per 1,000 person-years).
        confidence: Two-sided confidence level.

    Returns:
        One interval per band; all NaN for a band without person-time.

    Raises:
        ValueError: If the lengths differ, or a band's counts are invalid (see
            :func:`pipeline.stats.poisson_exact_interval`).

    Examples:
        >>> [round(r.estimate, 2) for r in band_rates([3, 0], [1000.0, 250.0])]
        [3.0, 0.0]
    """
    per = _per(per)
    if len(events) != len(person_years):
        raise ValueError(f"{len(events)} event counts but {len(person_years)} person-times")
    return [
        _scaled(poisson_exact_interval(k, py, confidence=confidence), per)
        for k, py in zip(events, person_years, strict=True)
    ]


def crude_rate(
    events: Sequence[int],
    person_years: Sequence[float],
    *,
    per: float = 1000.0,
    confidence: float = 0.95,
) -> Interval:
    """All events over all person-time of the bands, with the exact Poisson interval.

    Examples:
        >>> round(crude_rate([3, 1], [1000.0, 1000.0]).estimate, 2)
        2.0
    """
    per = _per(per)
    if len(events) != len(person_years):
        raise ValueError(f"{len(events)} event counts but {len(person_years)} person-times")
    total = float(np.sum(np.asarray(person_years, dtype=np.float64)))
    return _scaled(poisson_exact_interval(int(sum(events)), total, confidence=confidence), per)


def direct_standardised_rate(
    events: Sequence[int],
    person_years: Sequence[float],
    weights: Sequence[float],
    *,
    per: float = 1000.0,
    confidence: float = 0.95,
) -> Interval:
    """Directly standardised rate with the Fay and Feuer (1997) gamma interval.

    With ``d_i`` events over ``n_i`` person-years in band ``i`` and the standard's weights
    normalised to shares ``w_i`` (summing to 1):

    - ``y = sum(w_i * d_i / n_i)``, the standardised rate;
    - ``v = sum((w_i / n_i)^2 * d_i)``, its variance under Poisson counts;
    - ``m = max(w_i / n_i)``, the largest weight one event can carry;
    - lower limit ``G^-1(a/2; shape y^2 / v, scale v / y)``;
    - upper limit ``G^-1(1 - a/2; shape (y + m)^2 / (v + m^2), scale (v + m^2) / (y + m))``,

    where ``G^-1`` is the gamma quantile. The interval treats the DSR as a weighted sum of
    Poisson counts approximated by a gamma distribution with its mean and variance, and widens
    the upper limit as if one more event fell in the band of largest weight, which makes it
    conservative. With a single band it is exactly the Garwood interval (tested).

    Zero events: ``y = v = 0``; the lower limit is then exactly 0 (the gamma of shape 0 is a
    point mass at 0) and the upper limit is ``m * chi2(1 - a/2, 2) / 2``, the one-band upper
    limit for zero events at the largest weight per person-year.

    Bands with zero weight are ignored; a band with weight but no person-time has no rate, so
    the standardised rate is undefined and the call fails naming the band.

    Args:
        events: Events per band.
        person_years: Person-years per band.
        weights: The standard population in the same bands (any scale; normalised here).
        per: Person-years in the rate unit.
        confidence: Two-sided confidence level.

    Returns:
        The standardised rate per ``per`` person-years with its limits.

    Raises:
        ValueError: On lengths that differ, negative or non-integer events, negative weights or
            person-time, weights that sum to zero, or a weighted band without person-time.

    Examples:
        >>> r = direct_standardised_rate([10, 20], [1000.0, 1000.0], [1, 3])
        >>> round(r.estimate, 2)
        17.5
    """
    per = _per(per)
    alpha = _check_confidence(confidence)
    if not len(events) == len(person_years) == len(weights):
        raise ValueError("events, person_years and weights must have the same length")
    d = np.asarray(events, dtype=np.float64)
    n = np.asarray(person_years, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64)
    if (d < 0).any() or not np.array_equal(d, np.round(d)):
        raise ValueError("events must be non-negative integers")
    if (n < 0).any() or not np.isfinite(n).all() or (w < 0).any() or not np.isfinite(w).all():
        raise ValueError("person_years and weights must be finite and non-negative")
    if w.sum() <= 0:
        raise ValueError("the standard's weights sum to zero")
    used = w > 0
    empty = np.flatnonzero(used & (n == 0))
    if empty.size:
        raise ValueError(f"band {int(empty[0])} has a standard weight but no person-time")
    share = w[used] / w.sum()
    d, n = d[used], n[used]
    y = float(np.sum(share * d / n))
    v = float(np.sum((share / n) ** 2 * d))
    m = float(np.max(share / n))
    low = 0.0 if y == 0 else float(stats.gamma.ppf(alpha / 2, y * y / v, scale=v / y))
    shape_high = (y + m) ** 2 / (v + m * m)
    high = float(stats.gamma.ppf(1 - alpha / 2, shape_high, scale=(v + m * m) / (y + m)))
    return Interval(y * per, low * per, high * per)


def standardised_ratio(
    events: Sequence[int],
    person_years: Sequence[float],
    reference_rates: Sequence[float],
    *,
    reference_per: float = 1000.0,
    confidence: float = 0.95,
) -> StandardisedRatio:
    """Indirectly standardised ratio (SMR) of observed to expected events, exact interval.

    The expected count is ``sum(reference_rate_i / reference_per * person_years_i)``; it comes
    from a large reference population and is treated as fixed, so only the observed count is
    random (Poisson) and the limits are its Garwood limits divided by the expected count.

    Args:
        events: Observed events per band (only their sum is used for the ratio).
        person_years: The study's person-years per band.
        reference_rates: The reference rates per band, per ``reference_per`` person-years.
        reference_per: The unit of the reference rates.
        confidence: Two-sided confidence level.

    Returns:
        Observed, expected, the ratio and its limits (NaN when nothing is expected).

    Raises:
        ValueError: On lengths that differ or negative rates or person-time.

    Examples:
        >>> r = standardised_ratio([4, 6], [1000.0, 500.0], [2.0, 8.0])
        >>> r.observed, r.expected, r.ratio
        (10, 6.0, 1.6666666666666667)
    """
    reference_per = _per(reference_per)
    if not len(events) == len(person_years) == len(reference_rates):
        raise ValueError("events, person_years and reference_rates must have the same length")
    rates = np.asarray(reference_rates, dtype=np.float64)
    n = np.asarray(person_years, dtype=np.float64)
    if (
        (rates < 0).any()
        or (n < 0).any()
        or not (np.isfinite(rates).all() and np.isfinite(n).all())
    ):
        raise ValueError("reference rates and person_years must be finite and non-negative")
    observed = int(sum(events))
    expected = float(np.sum(rates / reference_per * n))
    if expected == 0:
        if observed:
            return StandardisedRatio(observed, 0.0, math.inf, math.nan, math.inf)
        return StandardisedRatio(0, 0.0, math.nan, math.nan, math.nan)
    ci = poisson_exact_interval(observed, expected, confidence=confidence)
    return StandardisedRatio(observed, expected, ci.estimate, ci.low, ci.high)
