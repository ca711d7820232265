"""Kaplan-Meier survival and Aalen-Johansen cumulative incidence with competing events.

When death competes with an outcome, ``1 - KM`` (treating deaths as censored) overstates the
risk of the outcome, because it pretends the dead could still develop it. The Aalen-Johansen
estimator gives the cumulative incidence function (CIF) of each cause instead, and the CIFs of
all causes add up to ``1 - S`` with ``S`` the Kaplan-Meier curve for "any event".

Conventions (the standard ones, as in lifelines and R ``survival``):

- Time 0 is included with ``S = 1`` and ``CIF = 0``.
- The curve has one step per distinct observed time (event or censoring), right-continuous.
- At a tied time, events happen before censorings: patients censored at ``t`` are still in the
  risk set for events at ``t``.
- Ties between causes at one time are handled exactly (no jitter), using the overall number of
  events at ``t`` for the survival factor.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl
from numpy.typing import ArrayLike, NDArray

from pipeline.compile import names
from pipeline.stats._columns import at_risk_rows, require_columns

__all__ = ["StepCurve", "aalen_johansen", "competing_risk_data", "kaplan_meier"]

CENSORED = 0
"""Event code of a censored observation."""
OUTCOME = 1
"""Event code of the outcome in :func:`competing_risk_data`."""
DEATH = 2
"""Event code of death without the outcome (the competing event) in :func:`competing_risk_data`."""


@dataclass(frozen=True, eq=False)
class StepCurve:
    """A right-continuous step function estimated from censored data.

    Attributes:
        times: 0 followed by the distinct observed times, ascending.
        values: The estimate at each time (survival for Kaplan-Meier, cumulative incidence of
            one cause for Aalen-Johansen), holding until the next time.
        at_risk: Patients at risk just before each time (still followed, no event yet).
        events: Events counted at each time (of the cause, for Aalen-Johansen).
    """

    times: NDArray[np.float64]
    values: NDArray[np.float64]
    at_risk: NDArray[np.int64]
    events: NDArray[np.int64]

    def at(self, t: ArrayLike) -> NDArray[np.float64]:
        """Evaluate the step function at arbitrary times.

        Args:
            t: Times to evaluate at; times before 0 get the value at 0.

        Returns:
            The value in force at each time (the last step at or before it).
        """
        idx = np.searchsorted(self.times, np.asarray(t, dtype=np.float64), side="right") - 1
        return self.values[np.clip(idx, 0, None)]


def _validate(
    durations: ArrayLike, codes: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    d = np.asarray(durations, dtype=np.float64)
    raw = np.asarray(codes)
    if d.ndim != 1 or raw.shape != d.shape:
        raise ValueError("durations and event codes must be one-dimensional and of equal length")
    if not np.all(np.isfinite(d)) or np.any(d < 0):
        raise ValueError("durations must be finite and non-negative")
    c = raw.astype(np.int64)
    if np.any(c != raw) or np.any(c < 0):
        raise ValueError("event codes must be non-negative integers (0 = censored)")
    return d, c


def _risk_table(
    d: NDArray[np.float64], c: NDArray[np.int64], max_code: int
) -> tuple[NDArray[np.float64], NDArray[np.int64], NDArray[np.int64]]:
    """Distinct times, the number at risk before each, and event counts per code at each."""
    times, inverse = np.unique(d, return_inverse=True)
    counts = np.zeros((times.size, max_code + 1), dtype=np.int64)
    np.add.at(counts, (inverse, c), 1)
    leaving = counts.sum(axis=1)
    at_risk = d.size - np.concatenate(([0], np.cumsum(leaving)[:-1]))
    return times, at_risk.astype(np.int64), counts


def _with_origin(
    times: NDArray[np.float64],
    values: NDArray[np.float64],
    at_risk: NDArray[np.int64],
    events: NDArray[np.int64],
    *,
    start: float,
    n: int,
) -> StepCurve:
    if times.size and times[0] == 0.0:
        return StepCurve(times, values, at_risk, events)
    return StepCurve(
        np.concatenate(([0.0], times)),
        np.concatenate(([start], values)),
        np.concatenate(([n], at_risk)).astype(np.int64),
        np.concatenate(([0], events)).astype(np.int64),
    )


def kaplan_meier(durations: ArrayLike, events: ArrayLike) -> StepCurve:
    """Kaplan-Meier estimate of the survival function.

    Args:
        durations: Time from origin to event or censoring, non-negative.
        events: Truthy where the observation ended in the event, falsy where censored. Any
            non-zero code counts as an event, so a competing-risks code array gives "any event".

    Returns:
        The survival curve ``S(t)``.

    Raises:
        ValueError: If the inputs differ in length, or durations are negative or not finite.

    Examples:
        >>> km = kaplan_meier([2, 3, 4, 5], [1, 0, 1, 1])
        >>> [round(float(v), 4) for v in km.values]
        [1.0, 0.75, 0.75, 0.375, 0.0]
    """
    d, c = _validate(durations, np.asarray(events).astype(bool).astype(np.int64))
    times, at_risk, counts = _risk_table(d, c, 1)
    dead = counts[:, 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        factors = np.where(at_risk > 0, 1.0 - dead / np.maximum(at_risk, 1), 1.0)
    return _with_origin(times, np.cumprod(factors), at_risk, dead, start=1.0, n=d.size)


def aalen_johansen(durations: ArrayLike, event_codes: ArrayLike, cause: int) -> StepCurve:
    """Aalen-Johansen cumulative incidence of one cause in the presence of competing causes.

    ``CIF_k(t) = sum over event times s <= t of S(s-) * d_k(s) / n(s)``, with ``S`` the
    Kaplan-Meier survival for any cause, ``d_k(s)`` the events of cause ``k`` at ``s`` and
    ``n(s)`` the number at risk just before ``s``.

    Args:
        durations: Time from origin to the first event or censoring, non-negative.
        event_codes: 0 for censored, ``1..k`` for the cause that ended the observation.
        cause: The cause whose cumulative incidence is wanted (``>= 1``).

    Returns:
        The cumulative incidence curve of ``cause``; ``events`` counts events of that cause.

    Raises:
        ValueError: If the inputs are invalid or ``cause`` is not a positive integer.

    Examples:
        >>> aj = aalen_johansen([2, 3, 4, 5], [1, 0, 2, 1], cause=1)
        >>> [round(float(v), 4) for v in aj.values]
        [0.0, 0.25, 0.25, 0.25, 0.625]
    """
    if isinstance(cause, bool) or int(cause) != cause or cause < 1:
        raise ValueError(f"cause must be a positive integer event code, got {cause!r}")
    d, c = _validate(durations, event_codes)
    max_code = max(int(cause), int(c.max()) if c.size else 0)
    times, at_risk, counts = _risk_table(d, c, max_code)
    any_event = counts[:, 1:].sum(axis=1)
    this = counts[:, int(cause)]
    safe_n = np.maximum(at_risk, 1)
    survival = np.cumprod(np.where(at_risk > 0, 1.0 - any_event / safe_n, 1.0))
    before = np.concatenate(([1.0], survival[:-1]))
    cif = np.cumsum(before * this / safe_n)
    return _with_origin(times, cif, at_risk, this, start=0.0, n=d.size)


def competing_risk_data(
    cohort: pl.DataFrame, outcome: str
) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    """Durations and event codes of the patients at risk of ``outcome``, death competing.

    The time is ``days_to_X`` for an incident case and ``followup_days`` otherwise. The code is
    1 (:data:`OUTCOME`) for an incident case, 2 (:data:`DEATH`) when follow-up ended by death
    without the outcome, else 0 (censored at loss, deregistration, end of data or horizon).

    Args:
        cohort: The analysis table.
        outcome: The outcome name ``X``.

    Returns:
        ``(durations_in_days, event_codes)``, in the table's row order.

    Raises:
        ValueError: If a needed column is missing, or an at-risk patient lacks a flag or time.

    Examples:
        >>> cohort = pl.DataFrame(
        ...     {
        ...         "at_risk_ckd": [True, True, True],
        ...         "incident_ckd": [True, False, False],
        ...         "days_to_ckd": [100, None, None],
        ...         "followup_days": [900, 400, 1461],
        ...         "end_reason": ["death", "death", "horizon"],
        ...     }
        ... )
        >>> durations, codes = competing_risk_data(cohort, "ckd")
        >>> durations.tolist(), codes.tolist()
        ([100.0, 400.0, 1461.0], [1, 2, 0])
    """
    columns = names.outcome_columns(outcome)
    need = [columns.days_to, "followup_days", "end_reason"]
    require_columns(cohort, need, what="competing-risks data")
    rows = at_risk_rows(cohort, [outcome], what="competing-risks data")
    incident = pl.col(columns.incident)
    out = rows.select(
        pl.when(incident)
        .then(pl.col(columns.days_to))
        .otherwise(pl.col("followup_days"))
        .cast(pl.Float64)
        .alias("duration"),
        pl.when(incident)
        .then(OUTCOME)
        .when(pl.col("end_reason") == "death")
        .then(DEATH)
        .otherwise(CENSORED)
        .cast(pl.Int64)
        .alias("code"),
    )
    if out["duration"].null_count():
        raise ValueError(f"competing-risks data: at-risk patient(s) without a time for {outcome}")
    return out["duration"].to_numpy(), out["code"].to_numpy()
