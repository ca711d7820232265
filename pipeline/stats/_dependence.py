"""Pairwise dependence between two outcomes among patients at risk of both.

For each pair the 2x2 table of incident status (``a`` both, ``b`` first only, ``c`` second
only, ``d`` neither) gives:

- the sample odds ratio ``ad / bc`` with a Woolf (log) interval. When a cell is 0 the log odds
  ratio is infinite, so 0.5 is added to every cell (Haldane-Anscombe) for the estimate *and*
  the interval; the result says so (``haldane``) and the report should too.
- the phi coefficient, the Pearson correlation of the two indicators. (Kendall's tau-b of two
  binary flags equals phi, and a copula parameter fitted to binary data is not identifiable,
  Genest and Neslehova 2007, so neither is reported.)
- observed against expected co-occurrence: ``a`` against the number of patients expected to
  have both if the two outcomes were independent *within strata* of age band and sex, so that
  two outcomes that merely share a dependence on age or sex do not look associated:
  ``E = sum over strata of n_s * p1_s * p2_s``, with ``n_s`` the stratum's patients at risk of
  both and ``p_s`` the crude proportion of each outcome among them (the same crude,
  within-horizon measure as ``a`` itself). The ratio ``a / E`` has an exact Poisson (Garwood)
  interval treating ``E`` as fixed. It assumes independence given age band and sex, and
  ignores censoring, as ``a`` does (both are counted within the horizon).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from itertools import combinations

import polars as pl
from scipy import stats

from pipeline.compile import names
from pipeline.stats._columns import at_risk_rows
from pipeline.stats._intervals import poisson_exact_interval

__all__ = [
    "AGE_BAND_YEARS",
    "DEPENDENCE_SCHEMA",
    "Association",
    "association_2x2",
    "expected_co_occurrence",
    "pairwise_dependence",
]

AGE_BAND_YEARS = 10
"""Width of the age bands (``age_at_index // 10``) that stratify the expected co-occurrence."""


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
    "expected": pl.Float64(),
    "oe_ratio": pl.Float64(),
    "oe_low": pl.Float64(),
    "oe_high": pl.Float64(),
    "strata": pl.String(),
}
"""Columns of :func:`pairwise_dependence`: the pair, patients at risk of both, the 2x2 cells
(see :class:`Association`), the odds ratio and phi, and observed (``a``) against expected
co-occurrence with its interval and what the expectation was stratified by."""


def association_2x2(a: int, b: int, c: int, d: int, *, confidence: float = 0.95) -> Association:
    """Odds ratio and phi of a 2x2 table.

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
    )


def _strata(cohort: pl.DataFrame) -> tuple[list[pl.Expr], str]:
    """Age band and sex, as far as the table has them, and their description."""
    keys, labels = [], []
    if "age_at_index" in cohort.columns:
        keys.append((pl.col("age_at_index") // AGE_BAND_YEARS).alias("age_band"))
        labels.append(f"{AGE_BAND_YEARS}-year age band")
    if "sex" in cohort.columns:
        keys.append(pl.col("sex"))
        labels.append("sex")
    return keys, " x ".join(labels) or "none"


def expected_co_occurrence(rows: pl.DataFrame, first: str, second: str) -> tuple[float, str]:
    """Patients expected to have both outcomes if independent within age band and sex.

    Args:
        rows: Patients at risk of both outcomes.
        first: The first outcome ``X`` (``incident_X``).
        second: The second outcome.

    Returns:
        ``sum n_s p1_s p2_s`` over the strata (crude proportions within each), and what the
        strata were (``"none"`` when the table has neither age nor sex: one stratum).

    Examples:
        >>> rows = pl.DataFrame(
        ...     {
        ...         "sex": ["F", "F", "F", "F", "M", "M"],
        ...         "incident_a": [True, True, False, False, True, False],
        ...         "incident_b": [True, False, True, False, False, False],
        ...     }
        ... )
        >>> expected_co_occurrence(rows, "a", "b")
        (1.0, 'sex')
    """
    keys, described = _strata(rows)
    x = pl.col(names.outcome_columns(first).incident).cast(pl.Int64)
    y = pl.col(names.outcome_columns(second).incident).cast(pl.Int64)
    per = (
        rows.group_by(keys)
        .agg(pl.len().alias("n"), x.sum().alias("e1"), y.sum().alias("e2"))
        .select((pl.col("e1").cast(pl.Float64) * pl.col("e2") / pl.col("n")).alias("expected"))
        if keys
        else rows.select((x.sum().cast(pl.Float64) * y.sum() / pl.len()).alias("expected"))
    )
    return float(per["expected"].sum()) if rows.height else 0.0, described


def pairwise_dependence(
    cohort: pl.DataFrame, outcomes: Sequence[str], *, confidence: float = 0.95
) -> pl.DataFrame:
    """Association of every pair of outcomes among patients at risk of both.

    Args:
        cohort: The analysis table (``age_at_index`` and ``sex`` stratify the expected
            co-occurrence when present).
        outcomes: Outcome names; pairs follow their order (``(o1, o2), (o1, o3), (o2, o3)``).
        confidence: Two-sided confidence level of the intervals.

    Returns:
        One row per pair, schema :data:`DEPENDENCE_SCHEMA`.

    Raises:
        ValueError: If a column is missing or an at-risk patient has a null incident flag.
    """
    records = []
    for first, second in combinations(list(outcomes), 2):
        rows = at_risk_rows(cohort, [first, second], what="pairwise dependence")
        x = rows[names.outcome_columns(first).incident]
        y = rows[names.outcome_columns(second).incident]
        a = int((x & y).sum())
        b = int((x & ~y).sum())
        c = int((~x & y).sum())
        d = rows.height - a - b - c
        r = association_2x2(a, b, c, d, confidence=confidence)
        expected, strata = expected_co_occurrence(rows, first, second)
        if expected > 0:
            oe = poisson_exact_interval(a, expected, confidence=confidence)
        else:  # nobody expected: no ratio (a is 0 too, as a <= each stratum's events)
            oe = poisson_exact_interval(0, 0.0, confidence=confidence)
        records.append(
            {"outcome_1": first, "outcome_2": second, "n": rows.height}
            | {k: getattr(r, k) for k in list(DEPENDENCE_SCHEMA)[3:12]}
            | {
                "expected": expected,
                "oe_ratio": oe.estimate,
                "oe_low": oe.low,
                "oe_high": oe.high,
                "strata": strata,
            }
        )
    return pl.DataFrame(records, schema=DEPENDENCE_SCHEMA, orient="row")
