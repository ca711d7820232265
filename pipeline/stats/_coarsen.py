"""Coarsening a survival or cumulative-incidence curve before it leaves the secure environment.

A full Kaplan-Meier or Aalen-Johansen curve steps at every event time, so it shows when each
single event happened, and its last steps are estimated from the few patients still followed
(the "tail" risk set). Both can describe individuals. :func:`coarsen_curve` keeps only steps
that stand for many patients:

- Steps may only fall on *candidate times* chosen without looking at event times: a fixed grid
  given by the caller (e.g. every 30 days). The curve's last observed time is a candidate too,
  but only when at least ``threshold`` patients are still followed to it: they all leave at that
  time, so it is shared by at least ``threshold`` patients.
- A candidate becomes a released step only when at least ``threshold`` events have happened
  since the previous released step (or since the origin) and at least ``threshold`` patients
  are at risk at it (followed up to it without an event). Candidates in between are merged: the
  curve jumps once, by the total.
- The curve is cut at the first candidate where fewer than ``threshold`` patients are at risk;
  nothing from there on is released. Because the risk set only shrinks, every earlier step had
  at least ``threshold`` at risk too.

The value at a released step is the full estimate at that time (the end of the merged
interval): it is exact where it is shown, and between released steps the curve holds the
previous value, so it may lag the full estimate by fewer than ``threshold`` events. The
released curve is drawn flat after its last step up to its *end*, the last candidate with at
least ``threshold`` patients at risk.

What this guarantees, per curve: every jump stands for at least ``threshold`` events, no jump is
at a time that only the data could have chosen unless ``threshold`` patients share it, and no
step is estimated from fewer than ``threshold`` patients at risk. It does not protect against
combining this curve with other published numbers. An estimate at a later time than the last
released step (the full estimate at the horizon) printed beside the curve would give away the
few events after that step, so the report prints the estimate and interval at the last released
step instead (``outputs/report/_curves.py``). Counts (events, numbers at risk) are suppressed
by the report's tables, not by this function.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from pipeline.stats._survival import StepCurve

__all__ = ["ReleasedCurve", "coarsen_curve"]


@dataclass(frozen=True, eq=False)
class ReleasedCurve:
    """A coarsened step function, safe to draw (see the module docstring).

    Attributes:
        times: 0 followed by the released step times, ascending.
        values: The full estimate at each released time (``start`` at 0).
        at_risk: Patients at risk at each released time (followed to it without an event).
        events: Events since the previous released time (at 0: none).
        end: Where the curve stops: the last candidate with at least ``threshold`` patients at
            risk (0 if there is none).
        threshold: The threshold the curve was coarsened with.
    """

    times: NDArray[np.float64]
    values: NDArray[np.float64]
    at_risk: NDArray[np.int64]
    events: NDArray[np.int64]
    end: float
    threshold: int

    def drawn(self) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Times and values to draw as a step path: the released steps, then the flat end."""
        if self.end > self.times[-1]:
            return np.append(self.times, self.end), np.append(self.values, self.values[-1])
        return self.times, self.values


def _at_risk(curve: StepCurve, t: NDArray[np.float64]) -> NDArray[np.int64]:
    """Patients still followed at each time ``t`` (duration >= t), from the curve's risk table.

    ``curve.at_risk[i]`` counts durations ``>= curve.times[i]``; for a time between two curve
    times the count is that of the next curve time, and after the last one it is 0.
    """
    following = np.searchsorted(curve.times, t, side="left")
    padded = np.append(curve.at_risk, 0)
    return padded[following].astype(np.int64)


def _events_up_to(curve: StepCurve, t: NDArray[np.float64]) -> NDArray[np.int64]:
    """Events at or before each time ``t``."""
    cumulative = np.concatenate(([0], np.cumsum(curve.events)))
    return cumulative[np.searchsorted(curve.times, t, side="right")].astype(np.int64)


def coarsen_curve(
    curve: StepCurve, threshold: int, *, start: float, grid: ArrayLike | None = None
) -> ReleasedCurve:
    """Keep only steps of at least ``threshold`` events with ``threshold`` patients at risk.

    Args:
        curve: The full curve (from :func:`pipeline.stats.kaplan_meier` or
            :func:`pipeline.stats.aalen_johansen`); ``events`` are the events that move it.
        threshold: The small-cell threshold (at least 1).
        start: The value before any event: 1 for survival, 0 for cumulative incidence. Events
            at time 0 belong to the first released step like any other.
        grid: Candidate step times, fixed in advance (e.g. every 30 days). Without one, every
            time of the curve is a candidate: steps then fall on event times, which is only
            right for uses that may show them.

    Returns:
        The released curve.

    Raises:
        ValueError: If ``threshold`` is below 1 or the grid has negative or non-finite times.

    Examples:
        >>> from pipeline.stats import kaplan_meier
        >>> km = kaplan_meier([1, 2, 3, 4, 5, 6, 7, 8], [1, 1, 1, 0, 1, 1, 0, 0])
        >>> released = coarsen_curve(km, 2, start=1.0, grid=[2, 4, 6, 8])
        >>> released.times.tolist(), [round(float(v), 4) for v in released.values]
        ([0.0, 2.0, 6.0], [1.0, 0.75, 0.3125])
        >>> released.end
        6.0
    """
    if isinstance(threshold, bool) or int(threshold) != threshold or threshold < 1:
        raise ValueError(f"threshold must be a positive integer, got {threshold!r}")
    own = curve.times[curve.times > 0]
    candidates = own if grid is None else np.asarray(grid, dtype=np.float64).ravel()
    if not np.all(np.isfinite(candidates)) or np.any(candidates < 0):
        raise ValueError("grid times must be finite and non-negative")
    # The last observed time is a candidate; the cut below drops it unless at least
    # `threshold` patients are followed to it (and then all of them leave there).
    candidates = np.append(candidates, curve.times[-1:])
    candidates = np.unique(candidates[candidates > 0])
    at_risk = _at_risk(curve, candidates)
    too_few = np.flatnonzero(at_risk < threshold)
    usable = candidates[: too_few[0]] if too_few.size else candidates
    events = _events_up_to(curve, usable)
    times, kept_risk, kept_events = [0.0], [int(curve.at_risk[0]) if curve.times.size else 0], [0]
    since = 0
    for t, n, e in zip(usable, at_risk[: usable.size], events, strict=True):
        if e - since >= threshold:
            times.append(float(t))
            kept_risk.append(int(n))
            kept_events.append(int(e - since))
            since = int(e)
    released = np.asarray(times, dtype=np.float64)
    values = np.concatenate(([start], curve.at(released[1:]))).astype(np.float64)
    return ReleasedCurve(
        times=released,
        values=values,
        at_risk=np.asarray(kept_risk, dtype=np.int64),
        events=np.asarray(kept_events, dtype=np.int64),
        end=float(usable[-1]) if usable.size else 0.0,
        threshold=int(threshold),
    )
