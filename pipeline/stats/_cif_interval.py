"""Confidence intervals for the Aalen-Johansen cumulative incidence, death competing.

The variance is the delta-method estimator given by Collett, *Modelling
Survival Data in Medical Research* (3rd ed., 2015, section 12.2), the one lifelines'
``AalenJohansenFitter`` implements. For the cause-``k`` cumulative incidence ``F`` at time
``t``, summing over the distinct event times ``t_i <= t`` with ``n_i`` at risk, ``d_i`` events
of any cause, ``d_ki`` of cause ``k`` and ``S`` the all-cause Kaplan-Meier survival::

    Var F(t) = sum (F(t) - F(t_i))^2 * d_i / (n_i (n_i - d_i))
             + sum S(t_{i-1})^2 * d_ki (n_i - d_ki) / n_i^3
             - 2 sum (F(t) - F(t_i)) * S(t_{i-1}) * d_ki / n_i^2

The interval is built on the ``log(-log F)`` scale (as Collett and lifelines do) and
transformed back, so it stays inside (0, 1): with ``se = sqrt(Var) / (F |log F|)`` the
limits are ``F ** exp(z se)`` and ``F ** exp(-z se)``. A time where every patient at risk has
an event (``n_i = d_i``) ends the curve; its first-term weight is taken as 0, because
``F(t) - F(t_i)`` is 0 from then on (lifelines gives NaN there).

Ties between causes at one time are handled exactly (no jitter, unlike lifelines), so results
agree with lifelines on data without such ties.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from pipeline.stats._intervals import Interval
from pipeline.stats._survival import _risk_table, _validate

__all__ = ["CifEstimate", "aalen_johansen_interval"]


@dataclass(frozen=True, eq=False)
class CifEstimate:
    """Aalen-Johansen cumulative incidence with its delta-method variance at given times.

    Attributes:
        times: The times asked for.
        estimate: ``F(t)`` at each time.
        variance: The delta-method variance of ``F(t)`` (Collett 2015).
        low: Lower limit on the log(-log) scale, transformed back (0 where ``F = 0``).
        high: Upper limit (NaN where ``F = 0``: no interval on that scale).
    """

    times: NDArray[np.float64]
    estimate: NDArray[np.float64]
    variance: NDArray[np.float64]
    low: NDArray[np.float64]
    high: NDArray[np.float64]

    def interval(self, i: int = -1) -> Interval:
        """The estimate and limits at the ``i``-th time asked for (default: the last)."""
        return Interval(float(self.estimate[i]), float(self.low[i]), float(self.high[i]))


def aalen_johansen_interval(
    durations: ArrayLike,
    event_codes: ArrayLike,
    cause: int,
    times: ArrayLike,
    *,
    confidence: float = 0.95,
) -> CifEstimate:
    """Cumulative incidence of ``cause`` at ``times`` with a delta-method interval.

    Args:
        durations: Time from origin to the first event or censoring, non-negative.
        event_codes: 0 for censored, ``1..k`` for the cause that ended the observation.
        cause: The cause whose cumulative incidence is wanted (``>= 1``).
        times: Times to evaluate at (e.g. the horizon, or the released curve steps).
        confidence: Two-sided confidence level.

    Returns:
        Estimates, variances and limits at each time.

    Raises:
        ValueError: If the inputs are invalid, ``cause`` is not a positive integer or
            ``confidence`` is not in (0, 1).

    Examples:
        >>> est = aalen_johansen_interval([1, 2, 3, 4], [1, 2, 1, 0], cause=1, times=[3])
        >>> round(float(est.estimate[0]), 4), round(float(est.variance[0]), 6)
        (0.5, 0.0625)
    """
    if isinstance(cause, bool) or int(cause) != cause or cause < 1:
        raise ValueError(f"cause must be a positive integer event code, got {cause!r}")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must lie strictly between 0 and 1, got {confidence!r}")
    d, c = _validate(durations, event_codes)
    at = np.asarray(times, dtype=np.float64).ravel()
    max_code = max(int(cause), int(c.max()) if c.size else 0)
    event_times, n, counts = _risk_table(d, c, max_code)
    any_event = counts[:, 1:].sum(axis=1).astype(np.float64)
    dk = counts[:, int(cause)].astype(np.float64)
    keep = any_event > 0  # censoring-only times change neither F nor the variance
    event_times, any_event, dk = event_times[keep], any_event[keep], dk[keep]
    n = n[keep].astype(np.float64)
    survival = np.cumprod(1.0 - any_event / np.maximum(n, 1.0))
    before = np.concatenate(([1.0], survival[:-1]))
    f = np.cumsum(before * dk / np.maximum(n, 1.0))
    left = n - any_event
    a = np.where(left > 0, any_event / (n * np.where(left > 0, left, 1.0)), 0.0)
    b = before**2 * dk * (n - dk) / n**3
    cc = before * dk / n**2
    # Expand the squares so each time needs only cumulative sums:
    # sum a (F - F_i)^2 = F^2 sum a - 2F sum a F_i + sum a F_i^2, and likewise for c.
    sums = [np.concatenate(([0.0], np.cumsum(x))) for x in (a, a * f, a * f**2, b, cc, cc * f)]
    j = np.searchsorted(event_times, at, side="right")  # event times <= t
    value = np.concatenate(([0.0], f))[j]
    s_a, s_af, s_af2, s_b, s_c, s_cf = (s[j] for s in sums)
    variance = value**2 * s_a - 2 * value * s_af + s_af2 + s_b - 2 * (value * s_c - s_cf)
    variance = np.maximum(variance, 0.0)  # cancellation can leave -1e-18 where it is 0
    z = float(stats.norm.ppf(0.5 + confidence / 2.0))
    low = np.zeros_like(value)
    high = np.full_like(value, math.nan)
    inner = (value > 0) & (value < 1)
    log_f = np.log(value[inner])
    se = np.sqrt(variance[inner]) / (value[inner] * np.abs(log_f))
    # F = exp(-exp(g)); a larger g is a smaller F, so the upper g limit gives the lower F.
    low[inner] = value[inner] ** np.exp(z * se)
    high[inner] = value[inner] ** np.exp(-z * se)
    full = value >= 1.0
    low[full], high[full] = 1.0, 1.0
    return CifEstimate(at, value, variance, low, high)
