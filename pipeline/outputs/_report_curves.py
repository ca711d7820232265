"""The cumulative incidence curves as released: coarsened so that no step shows a patient."""

from __future__ import annotations

from typing import Any

import numpy as np
import polars as pl

from pipeline.stats import (
    DAYS_PER_YEAR,
    OUTCOME,
    aalen_johansen,
    coarsen_curve,
    competing_risk_data,
    kaplan_meier,
)

CURVE_GRID_DAYS = 30
"""Released curves may step only every this many days (and at the last day of follow-up)."""


def curve_note(threshold: int) -> str:
    """The sentence under the curves that says how they were coarsened, and what that costs."""
    return (
        f"So that no curve shows a single patient, each step stands for at least {threshold} "
        f"events since the previous step, steps fall only every {CURVE_GRID_DAYS} days or on the "
        f"last day of follow-up when at least {threshold} patients reach it, and the curves stop "
        f"where fewer than {threshold} patients are at risk. At each step the curve shows the "
        "full estimate on that day; between steps it may lag the full estimate by fewer than "
        f"{threshold} events."
    )


def curve_data(cohort: pl.DataFrame, outcome: str, threshold: int) -> tuple[Any, Any, Any, Any]:
    """Aalen-Johansen (death competing) and 1 - Kaplan-Meier (deaths censored), in years.

    Both curves are coarsened by :func:`pipeline.stats.coarsen_curve` on a grid of
    :data:`CURVE_GRID_DAYS` days: each drawn step stands for at least ``threshold`` events and
    at least ``threshold`` patients at risk, and the curves stop where fewer are at risk. The
    two share their event counts and risk sets, so they step at the same times.
    """
    durations, codes = competing_risk_data(cohort, outcome)
    last = float(durations.max()) if durations.size else 0.0
    grid = np.arange(CURVE_GRID_DAYS, last + CURVE_GRID_DAYS, CURVE_GRID_DAYS, dtype=np.float64)
    aj = coarsen_curve(aalen_johansen(durations, codes, OUTCOME), threshold, start=0.0, grid=grid)
    km = kaplan_meier(durations, codes == OUTCOME)
    km_times, km_values = coarsen_curve(km, threshold, start=1.0, grid=grid).drawn()
    aj_times, aj_values = aj.drawn()
    return aj_times / DAYS_PER_YEAR, aj_values, km_times / DAYS_PER_YEAR, 1.0 - km_values
