"""Cumulative incidence, crude proportions and incidence rates of one outcome.

All count only patients at risk of the outcome at the index date (``at_risk_X``), so prevalent
cases never enter a denominator.

- The cumulative incidence at the horizon is the Aalen-Johansen estimate with death as the
  competing event and its delta-method interval (:mod:`._cif_interval`): it accounts for
  follow-up that ends early, and does not pretend the dead could still develop the outcome.
- The crude proportion is the share of at-risk patients with an incident onset within the
  horizon, with a Wilson interval. It ignores censoring (a patient lost after a year counts as
  a non-case), so it is a lower bound whenever follow-up ends before the horizon.
- The incidence rate divides events by person-time: each at-risk patient contributes from the
  index date to onset if incident, else to the end of follow-up (``followup_days``), in years of
  365.25 days. Its interval is the exact Poisson (Garwood) interval.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import polars as pl

from pipeline.compile import names
from pipeline.stats._cif_interval import aalen_johansen_interval
from pipeline.stats._columns import at_risk_rows, require_columns
from pipeline.stats._intervals import Interval, poisson_exact_interval, wilson_interval
from pipeline.stats._survival import OUTCOME, competing_risk_data

__all__ = [
    "CrudeProportion",
    "IncidenceRate",
    "crude_proportion",
    "cumulative_incidence_at_horizon",
    "incidence_rate",
]

DAYS_PER_YEAR = 365.25
"""Days in a person-year: the mean Julian year, so leap years need no special case."""


@dataclass(frozen=True, slots=True)
class CrudeProportion:
    """Share of at-risk patients with an incident onset within the horizon (censoring ignored).

    Attributes:
        outcome: The outcome name ``X``.
        at_risk: Patients at risk at the index date.
        events: At-risk patients with an incident onset.
        proportion: ``events / at_risk`` (NaN when nobody is at risk).
        low: Lower Wilson limit.
        high: Upper Wilson limit.
    """

    outcome: str
    at_risk: int
    events: int
    proportion: float
    low: float
    high: float


@dataclass(frozen=True, slots=True)
class IncidenceRate:
    """Events per person-time among at-risk patients.

    Attributes:
        outcome: The outcome name ``X``.
        events: Incident onsets.
        person_years: Follow-up of at-risk patients to onset or end of follow-up, in years.
        per: The rate unit, e.g. 1000 for "per 1,000 person-years".
        rate: ``events / person_years * per`` (NaN with no person-time).
        low: Lower exact Poisson limit, per ``per`` person-years.
        high: Upper exact Poisson limit, per ``per`` person-years.
    """

    outcome: str
    events: int
    person_years: float
    per: float
    rate: float
    low: float
    high: float


def crude_proportion(
    cohort: pl.DataFrame, outcome: str, *, confidence: float = 0.95
) -> CrudeProportion:
    """Count incident onsets among patients at risk of ``outcome``, with a Wilson interval.

    A patient whose follow-up ended early without the outcome counts as a non-case, so this is
    not a cumulative incidence; :func:`cumulative_incidence_at_horizon` is.

    Args:
        cohort: The analysis table.
        outcome: The outcome name ``X`` (uses ``at_risk_X`` and ``incident_X``).
        confidence: Two-sided confidence level.

    Returns:
        The counts, the proportion and its interval.

    Raises:
        ValueError: If a needed column is missing or an at-risk patient has no incident flag.

    Examples:
        >>> cohort = pl.DataFrame(
        ...     {
        ...         "at_risk_ckd": [True, True, True, False],
        ...         "incident_ckd": [True, False, False, None],
        ...     }
        ... )
        >>> ci = crude_proportion(cohort, "ckd")
        >>> ci.at_risk, ci.events, round(ci.proportion, 4)
        (3, 1, 0.3333)
    """
    rows = at_risk_rows(cohort, [outcome], what="crude proportion")
    n = rows.height
    events = int(rows[names.outcome_columns(outcome).incident].sum())
    ci = wilson_interval(events, n, confidence=confidence)
    return CrudeProportion(outcome, n, events, ci.estimate, ci.low, ci.high)


def cumulative_incidence_at_horizon(
    cohort: pl.DataFrame, outcome: str, *, confidence: float = 0.95
) -> Interval:
    """Aalen-Johansen cumulative incidence at the end of follow-up, death competing.

    Follow-up ends at the horizon at the latest, so the curve is flat from the last observed
    time on and its value there is the cumulative incidence at the horizon. The interval is
    the delta-method one of :func:`pipeline.stats.aalen_johansen_interval` (Collett 2015,
    log(-log) scale).

    Args:
        cohort: The analysis table (``at_risk_X``, ``incident_X``, ``days_to_X``,
            ``followup_days``, ``end_reason``).
        outcome: The outcome name ``X``.
        confidence: Two-sided confidence level.

    Returns:
        The estimate with its limits; all NaN when nobody is at risk.

    Examples:
        >>> cohort = pl.DataFrame(
        ...     {
        ...         "at_risk_ckd": [True, True, True, True],
        ...         "incident_ckd": [True, False, True, False],
        ...         "days_to_ckd": [1, None, 3, None],
        ...         "followup_days": [4, 2, 4, 4],
        ...         "end_reason": ["horizon", "death", "horizon", "horizon"],
        ...     }
        ... )
        >>> cumulative_incidence_at_horizon(cohort, "ckd").estimate
        0.5
    """
    durations, codes = competing_risk_data(cohort, outcome)
    if durations.size == 0:
        return Interval(math.nan, math.nan, math.nan)
    horizon = [float(durations.max())]
    return aalen_johansen_interval(
        durations, codes, OUTCOME, horizon, confidence=confidence
    ).interval()


def incidence_rate(
    cohort: pl.DataFrame, outcome: str, *, per: float = 1000.0, confidence: float = 0.95
) -> IncidenceRate:
    """Incidence rate per ``per`` person-years among patients at risk, with an exact interval.

    Args:
        cohort: The analysis table.
        outcome: The outcome name ``X`` (uses ``at_risk_X``, ``incident_X``, ``days_to_X`` and
            ``followup_days``).
        per: Person-years in the rate unit.
        confidence: Two-sided confidence level.

    Returns:
        Events, person-years, and the rate with its Garwood interval, all per ``per``
        person-years.

    Raises:
        ValueError: If a needed column is missing, an at-risk patient has no incident flag, an
            incident patient has no ``days_to_X``, follow-up is missing or negative, or ``per``
            is not positive.

    Examples:
        >>> cohort = pl.DataFrame(
        ...     {
        ...         "at_risk_ckd": [True, True],
        ...         "incident_ckd": [True, False],
        ...         "days_to_ckd": [461, None],
        ...         "followup_days": [1461, 1000],
        ...     }
        ... )
        >>> r = incidence_rate(cohort, "ckd")
        >>> r.events, round(r.person_years, 4), round(r.rate, 2)
        (1, 4.0, 250.0)
    """
    if not per > 0:
        raise ValueError(f"per must be positive, got {per!r}")
    columns = names.outcome_columns(outcome)
    require_columns(cohort, [columns.days_to, "followup_days"], what="incidence rate")
    rows = at_risk_rows(cohort, [outcome], what="incidence rate")
    incident = pl.col(columns.incident)
    days = rows.select(
        pl.when(incident).then(pl.col(columns.days_to)).otherwise(pl.col("followup_days"))
    ).to_series()
    if days.null_count():
        raise ValueError(
            f"incidence rate: {days.null_count()} at-risk patient(s) have no follow-up time "
            f"({columns.days_to} for incident cases, else followup_days)"
        )
    if rows.height and days.min() < 0:  # type: ignore[operator]
        raise ValueError(f"incidence rate: negative follow-up time for {outcome}")
    events = int(rows[columns.incident].sum())
    person_years = float(days.cast(pl.Float64).sum()) / DAYS_PER_YEAR
    ci = poisson_exact_interval(events, person_years, confidence=confidence)
    return IncidenceRate(
        outcome, events, person_years, float(per), ci.estimate * per, ci.low * per, ci.high * per
    )
