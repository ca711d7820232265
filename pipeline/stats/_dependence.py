"""Pairwise dependence between two outcomes among patients at risk of both.

For each pair the 2x2 table of incident status (``a`` both, ``b`` first only, ``c`` second
only, ``d`` neither) gives:

- the sample odds ratio ``ad / bc`` with a Woolf (log) interval. When a cell is 0 the log odds
  ratio is infinite, so 0.5 is added to every cell (Haldane-Anscombe) for the estimate *and*
  the interval; the result says so (``haldane``) and the report should too.
- the phi coefficient, the Pearson correlation of the two indicators.
- Kendall's tau-b of the two binary variables. For a 2x2 table tau-b equals phi exactly; it is
  computed from concordant and discordant pairs anyway, as it feeds the copula below.
- the Frank copula parameter theta implied by tau, by inverting
  ``tau(theta) = 1 - 4 / theta * (1 - D1(theta))`` with the Debye function
  ``D1(theta) = 1/theta * integral_0^theta t / (e^t - 1) dt`` (Genest 1987, *Biometrika*
  74:549). Tau from binary data is attenuated by the ties, so theta is a descriptive summary of
  the dependence, not an estimate of a latent-time copula.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from itertools import combinations

import polars as pl
from scipy import integrate, optimize, stats

from pipeline.stats._columns import at_risk_rows

__all__ = [
    "DEPENDENCE_SCHEMA",
    "Association",
    "association_2x2",
    "frank_tau",
    "frank_theta_from_tau",
    "pairwise_dependence",
]

_SMALL_THETA = 1e-3


@dataclass(frozen=True, slots=True)
class Association:
    """Association measures of a 2x2 table of two binary outcomes.

    Attributes:
        a: Both outcomes.
        b: First outcome only.
        c: Second outcome only.
        d: Neither.
        odds_ratio: ``ad / bc`` (after the Haldane correction when ``haldane`` is true).
        or_low: Lower Woolf limit.
        or_high: Upper Woolf limit.
        haldane: Whether 0.5 was added to every cell because one was 0.
        phi: Phi coefficient; NaN when a margin is 0.
        tau_b: Kendall's tau-b; NaN when a margin is 0.
        frank_theta: Frank copula parameter with Kendall's tau equal to ``tau_b``.
    """

    a: int
    b: int
    c: int
    d: int
    odds_ratio: float
    or_low: float
    or_high: float
    haldane: bool
    phi: float
    tau_b: float
    frank_theta: float


DEPENDENCE_SCHEMA: dict[str, pl.DataType] = {
    "outcome_1": pl.String(),
    "outcome_2": pl.String(),
    "n": pl.Int64(),
    "a": pl.Int64(),
    "b": pl.Int64(),
    "c": pl.Int64(),
    "d": pl.Int64(),
    "odds_ratio": pl.Float64(),
    "or_low": pl.Float64(),
    "or_high": pl.Float64(),
    "haldane": pl.Boolean(),
    "phi": pl.Float64(),
    "tau_b": pl.Float64(),
    "frank_theta": pl.Float64(),
}
"""Columns of :func:`pairwise_dependence`: the pair, patients at risk of both, the 2x2 cells
(see :class:`Association`) and the measures."""


def _debye_integrand(t: float) -> float:
    # t / (e^t - 1), written so large t cannot overflow; the limit at 0 is 1.
    if t == 0.0:
        return 1.0
    return t * math.exp(-t) / -math.expm1(-t)


def frank_tau(theta: float) -> float:
    """Kendall's tau of the Frank copula with parameter ``theta``.

    Uses ``tau = 1 - 4/theta * (1 - D1(theta))``, odd in theta, with the series
    ``theta/9 - theta**3/900`` near 0 where the closed form cancels badly.

    Args:
        theta: The Frank parameter (any real; 0 is independence).

    Returns:
        Kendall's tau in (-1, 1).

    Examples:
        >>> round(frank_tau(5.0), 6)
        0.456701
    """
    if math.isnan(theta):
        return math.nan
    if math.isinf(theta):
        return math.copysign(1.0, theta)
    x = abs(theta)
    if x < _SMALL_THETA:
        return theta / 9.0 - theta**3 / 900.0
    # The integrand is below 1e-40 past t = 100, so the tail adds nothing at double precision.
    integral, _ = integrate.quad(_debye_integrand, 0.0, min(x, 100.0), epsabs=1e-14, limit=200)
    tau = 1.0 - 4.0 / x * (1.0 - integral / x)
    return math.copysign(tau, theta)


def frank_theta_from_tau(tau: float) -> float:
    """Frank copula parameter whose Kendall's tau is ``tau`` (Genest 1987).

    Solves ``frank_tau(theta) = tau`` with Brent's method on a bracket widened until it holds
    the root; tau is odd in theta, so only positive roots are searched.

    Args:
        tau: Kendall's tau in [-1, 1].

    Returns:
        Theta; 0 for tau 0, +-inf for tau +-1, NaN for NaN.

    Raises:
        ValueError: If ``|tau| > 1``.

    Examples:
        >>> round(frank_theta_from_tau(0.213895), 4)
        2.0
    """
    if math.isnan(tau):
        return math.nan
    if abs(tau) > 1.0:
        raise ValueError(f"Kendall's tau must lie in [-1, 1], got {tau}")
    if tau == 0.0:
        return 0.0
    if abs(tau) == 1.0:
        return math.copysign(math.inf, tau)
    target = abs(tau)
    high = 1.0
    while frank_tau(high) < target:
        high *= 2.0
    theta = optimize.brentq(lambda t: frank_tau(t) - target, 0.0, high, xtol=1e-12, rtol=1e-14)
    return math.copysign(float(theta), tau)


def _kendall_tau_b(a: int, b: int, c: int, d: int) -> float:
    """Kendall's tau-b of two binary variables from their pairs of patients.

    Concordant pairs are (both, neither) = ``a*d``, discordant (first only, second only) =
    ``b*c``; the denominator counts pairs not tied on each variable. Algebraically this equals
    phi.
    """
    n = a + b + c + d

    def pairs(k: int) -> int:
        return k * (k - 1) // 2

    untied_1 = pairs(n) - pairs(a + b) - pairs(c + d)
    untied_2 = pairs(n) - pairs(a + c) - pairs(b + d)
    if untied_1 == 0 or untied_2 == 0:
        return math.nan
    return (a * d - b * c) / math.sqrt(untied_1 * untied_2)


def association_2x2(a: int, b: int, c: int, d: int, *, confidence: float = 0.95) -> Association:
    """Odds ratio, phi, Kendall's tau-b and Frank theta of a 2x2 table.

    Args:
        a: Both outcomes.
        b: First outcome only.
        c: Second outcome only.
        d: Neither.
        confidence: Two-sided confidence level of the odds-ratio interval.

    Returns:
        The measures; see :class:`Association`.

    Raises:
        ValueError: If a count is negative or ``confidence`` is not in (0, 1).

    Examples:
        >>> r = association_2x2(40, 10, 20, 30)
        >>> r.odds_ratio, round(r.or_low, 4), round(r.or_high, 4), round(r.phi, 6)
        (6.0, 2.4526, 14.6781, 0.408248)
    """
    cells = (a, b, c, d)
    if any(int(x) != x or x < 0 for x in cells):
        raise ValueError(f"2x2 cells must be non-negative integers, got {cells}")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must lie strictly between 0 and 1, got {confidence!r}")
    a, b, c, d = (int(x) for x in cells)
    haldane = 0 in cells
    fa, fb, fc, fd = (x + 0.5 if haldane else float(x) for x in (a, b, c, d))
    log_or = math.log(fa * fd / (fb * fc))
    se = math.sqrt(1 / fa + 1 / fb + 1 / fc + 1 / fd)
    z = float(stats.norm.ppf(0.5 + confidence / 2.0))
    margins = (a + b) * (c + d) * (a + c) * (b + d)
    phi = (a * d - b * c) / math.sqrt(margins) if margins else math.nan
    tau_b = _kendall_tau_b(a, b, c, d)
    return Association(
        a=a,
        b=b,
        c=c,
        d=d,
        odds_ratio=math.exp(log_or),
        or_low=math.exp(log_or - z * se),
        or_high=math.exp(log_or + z * se),
        haldane=haldane,
        phi=phi,
        tau_b=tau_b,
        frank_theta=frank_theta_from_tau(tau_b),
    )


def pairwise_dependence(
    cohort: pl.DataFrame, outcomes: Sequence[str], *, confidence: float = 0.95
) -> pl.DataFrame:
    """Association of every pair of outcomes among patients at risk of both.

    Args:
        cohort: The analysis table.
        outcomes: Outcome names; pairs follow their order (``(o1, o2), (o1, o3), (o2, o3)``).
        confidence: Two-sided confidence level of the odds-ratio interval.

    Returns:
        One row per pair, schema :data:`DEPENDENCE_SCHEMA`.

    Raises:
        ValueError: If a column is missing or an at-risk patient has a null incident flag.
    """
    records = []
    for first, second in combinations(list(outcomes), 2):
        rows = at_risk_rows(cohort, [first, second], what="pairwise dependence")
        x = rows[f"incident_{first}"]
        y = rows[f"incident_{second}"]
        a = int((x & y).sum())
        b = int((x & ~y).sum())
        c = int((~x & y).sum())
        d = rows.height - a - b - c
        r = association_2x2(a, b, c, d, confidence=confidence)
        records.append(
            {"outcome_1": first, "outcome_2": second, "n": rows.height}
            | {k: getattr(r, k) for k in list(DEPENDENCE_SCHEMA)[3:]}
        )
    return pl.DataFrame(records, schema=DEPENDENCE_SCHEMA, orient="row")
