"""The cumulative incidence curves as released: coarsened so that no step shows a patient.

Each outcome's Aalen-Johansen curve is coarsened (:func:`pipeline.stats.coarsen_curve`), and
everything else the report says about the curve is taken at its released steps only:

- the pointwise 95% band is the delta-method interval of the headline
  (:func:`pipeline.stats.aalen_johansen_interval`) evaluated at each released step and held
  until the next, like the curve;
- the headline cumulative incidence of the incidence table is the curve's value at its last
  released step, with the band there as its interval.

Why the headline is not the full estimate at the horizon: the coarsened curve shows the full
estimate at its last step and holds it to its end, so whatever happened after that step stands
for fewer than ``threshold`` events (otherwise there would be another step) or was estimated
from fewer than ``threshold`` patients at risk (the curve is cut there). A headline at the
horizon printed next to the curve would show the difference, a function of those few events.
Taking the headline at the last released step releases nothing the curve does not show; when
the last step falls on the last day of follow-up (enough events up to it and enough patients
reaching it) the two are the same number. The incidence table says at which time it is.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import polars as pl
from numpy.typing import NDArray

from pipeline.stats import (
    DAYS_PER_YEAR,
    OUTCOME,
    CifEstimate,
    ReleasedCurve,
    aalen_johansen,
    aalen_johansen_interval,
    coarsen_curve,
    competing_risk_data,
    kaplan_meier,
)

CURVE_GRID_DAYS = 30
"""Released curves may step only every this many days (and at the last day of follow-up)."""

BAND_CONFIDENCE = 0.95
"""Pointwise confidence level of the band drawn around the Aalen-Johansen curve."""


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


def band_note() -> str:
    """The caption sentence that says what the shaded band is and how it was computed."""
    return (
        f"The shaded band is a pointwise {100 * BAND_CONFIDENCE:g}% confidence interval of the "
        "Aalen–Johansen curve at each of its steps, held until the next step like the curve: "
        "the delta-method variance given by Collett 2015, on the log(−log) scale, the same "
        "interval as the cumulative incidence of the incidence table, which is the curve's "
        "value at its last step."
    )


@dataclass(frozen=True)
class Headline:
    """The released cumulative incidence of an outcome: the curve's value at its last step.

    Attributes:
        estimate: The Aalen-Johansen estimate at ``days`` (NaN when the curve has no step).
        low: Lower limit of the band there.
        high: Upper limit of the band there.
        days: Days since index of the curve's last released step (NaN when it has none).
    """

    estimate: float
    low: float
    high: float
    days: float

    @property
    def years(self) -> float:
        """``days`` in years of 365.25 days."""
        return self.days / DAYS_PER_YEAR


@dataclass(frozen=True, eq=False)
class OutcomeCurves:
    """One outcome's curves as released, with the band at the Aalen-Johansen steps.

    Attributes:
        aj: The coarsened Aalen-Johansen curve (death competing).
        km: The coarsened Kaplan-Meier survival (deaths censored).
        band: The delta-method estimate and limits at each of ``aj.times``.
    """

    aj: ReleasedCurve
    km: ReleasedCurve
    band: CifEstimate

    @property
    def headline(self) -> Headline:
        """The cumulative incidence the report prints: the value at the last released step."""
        if self.aj.times.size < 2:  # no step at all: nothing but 0 at day 0
            return Headline(math.nan, math.nan, math.nan, math.nan)
        return Headline(
            float(self.band.estimate[-1]),
            float(self.band.low[-1]),
            float(self.band.high[-1]),
            float(self.aj.times[-1]),
        )

    def band_limits(self) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Lower and upper band at each drawn Aalen-Johansen time (as ``aj.drawn()``).

        At day 0 the estimate is 0 and so is the band; after the last step the band holds.
        """
        low = np.nan_to_num(self.band.low, nan=0.0)
        high = np.where(np.isnan(self.band.high), self.band.estimate, self.band.high)
        if self.aj.end > self.aj.times[-1]:
            low, high = np.append(low, low[-1]), np.append(high, high[-1])
        return low, high

    def years(self) -> tuple[NDArray[np.float64], ...]:
        """Everything to draw, times in years: AJ times and values, band, KM times and risk."""
        aj_times, aj_values = self.aj.drawn()
        km_times, km_values = self.km.drawn()
        low, high = self.band_limits()
        return (
            aj_times / DAYS_PER_YEAR,
            aj_values,
            low,
            high,
            km_times / DAYS_PER_YEAR,
            1.0 - km_values,
        )


def outcome_curves(cohort: pl.DataFrame, outcome: str, threshold: int) -> OutcomeCurves:
    """Aalen-Johansen (death competing) and Kaplan-Meier (deaths censored), coarsened, with band.

    Both curves are coarsened by :func:`pipeline.stats.coarsen_curve` on a grid of
    :data:`CURVE_GRID_DAYS` days: each drawn step stands for at least ``threshold`` events and
    at least ``threshold`` patients at risk, and the curves stop where fewer are at risk. The
    two share their event counts and risk sets, so they step at the same times. The band is the
    delta-method interval at the Aalen-Johansen curve's released steps only.
    """
    durations, codes = competing_risk_data(cohort, outcome)
    last = float(durations.max()) if durations.size else 0.0
    grid = np.arange(CURVE_GRID_DAYS, last + CURVE_GRID_DAYS, CURVE_GRID_DAYS, dtype=np.float64)
    aj = coarsen_curve(aalen_johansen(durations, codes, OUTCOME), threshold, start=0.0, grid=grid)
    km = coarsen_curve(kaplan_meier(durations, codes == OUTCOME), threshold, start=1.0, grid=grid)
    band = aalen_johansen_interval(durations, codes, OUTCOME, aj.times, confidence=BAND_CONFIDENCE)
    return OutcomeCurves(aj, km, band)
