"""Curves coarsened before release: every step stands for enough events and patients at risk.

The hand-computed examples were worked out on paper from the Aalen-Johansen and Kaplan-Meier
formulas; the properties are checked against the raw durations and codes, not against the
curve's own risk table, so an error in reading that table would show.
"""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.outputs.report._curves import CURVE_GRID_DAYS, curve_note, outcome_curves
from pipeline.stats import (
    DAYS_PER_YEAR,
    OUTCOME,
    aalen_johansen,
    coarsen_curve,
    kaplan_meier,
)

# 10 patients; codes: 1 outcome, 2 death first, 0 censored.
DURATIONS = [2, 3, 3, 4, 5, 6, 8, 9, 10, 10]
CODES = [1, 2, 1, 1, 0, 1, 1, 0, 1, 0]


def test_hand_computed_aalen_johansen_threshold_2() -> None:
    # Risk sets 10, 9, 7, 6, 5, 4, 3, 2 at times 2, 3, 4, 5, 6, 8, 9, 10; any-event survival
    # 0.9, 0.7, 0.6, 0.48, 0.36, 0.18; CIF 0.1, 0.2, 0.3, 0.42, 0.54, 0.72 at 2, 3, 4, 6, 8, 10.
    # On the grid 2, 4, 6, 8, 10 the events so far are 1, 3, 4, 5, 6: steps at 4 (3 events) and
    # 8 (2 more); 10 has 2 at risk, so the curve runs flat to it.
    aj = aalen_johansen(DURATIONS, CODES, cause=1)
    released = coarsen_curve(aj, 2, start=0.0, grid=[2, 4, 6, 8, 10])
    assert released.times.tolist() == [0.0, 4.0, 8.0]
    assert released.values.tolist() == pytest.approx([0.0, 0.3, 0.54])
    assert released.events.tolist() == [0, 3, 2]
    assert released.at_risk.tolist() == [10, 7, 4]
    assert released.end == 10.0
    times, values = released.drawn()
    assert times.tolist() == [0.0, 4.0, 8.0, 10.0]
    assert values.tolist() == pytest.approx([0.0, 0.3, 0.54, 0.54])


def test_hand_computed_threshold_3_cuts_the_tail() -> None:
    # At 10 only 2 patients are at risk: the curve stops at 8, and the 2 events after the step
    # at 4 (at 6 and 8) are too few for a step of their own.
    aj = aalen_johansen(DURATIONS, CODES, cause=1)
    released = coarsen_curve(aj, 3, start=0.0, grid=[2, 4, 6, 8, 10])
    assert released.times.tolist() == [0.0, 4.0]
    assert released.values.tolist() == pytest.approx([0.0, 0.3])
    assert released.end == 8.0


def test_hand_computed_kaplan_meier_without_grid_steps_on_event_times() -> None:
    # Without a grid every curve time is a candidate: events at 2, 3, 4 (deaths censored).
    km = kaplan_meier(DURATIONS, np.asarray(CODES) == 1)
    released = coarsen_curve(km, 2, start=1.0)
    # S: 2 -> 0.9; 3 -> 0.9 * 8/9 = 0.8; 4 -> 0.8 * 6/7; 6 -> * 4/5; 8 -> * 3/4; 10 -> * 1/2
    s4 = 0.8 * 6 / 7
    assert released.times.tolist() == [0.0, 3.0, 6.0, 10.0]
    assert released.values.tolist() == pytest.approx([1.0, 0.8, s4 * 4 / 5, s4 * 4 / 5 * 3 / 8])


def test_last_time_is_a_step_only_when_enough_patients_share_it() -> None:
    # Five patients followed to day 7 (the horizon), one event per day before it.
    durations = [1, 2, 3, 4, 5, 7, 7, 7, 7, 7]
    events = [1, 1, 1, 1, 1, 0, 0, 0, 0, 0]
    km = kaplan_meier(durations, events)
    five = coarsen_curve(km, 5, start=1.0, grid=[3, 6])
    assert (five.times.tolist(), five.values.tolist(), five.end) == ([0.0, 6.0], [1.0, 0.5], 7.0)
    # with 6, day 7 (5 patients) is no candidate, and day 6 has 5 at risk: the curve ends at 3
    six = coarsen_curve(km, 6, start=1.0, grid=[3, 6])
    assert (six.times.tolist(), six.end) == ([0.0], 3.0)


@pytest.mark.parametrize("threshold", [0, -1, 2.5, True])
def test_threshold_must_be_a_positive_integer(threshold: object) -> None:
    with pytest.raises(ValueError, match="positive integer"):
        coarsen_curve(kaplan_meier([1], [1]), threshold, start=1.0)  # type: ignore[arg-type]


def _events_in(d: np.ndarray, c: np.ndarray, low: float, high: float) -> int:
    """Outcome events with low < time <= high (time 0 counts in the first interval)."""
    return int(np.sum((c == OUTCOME) & (d <= high) & ((d > low) | (low == 0.0))))


@settings(max_examples=300, deadline=None)
@given(
    data=st.lists(
        st.tuples(st.integers(0, 40), st.sampled_from([0, 1, 1, 2])), min_size=1, max_size=60
    ),
    threshold=st.integers(1, 6),
    every=st.one_of(st.none(), st.integers(1, 9)),
    kind=st.sampled_from(["aj", "km"]),
)
def test_every_released_step_protects_its_patients(
    data: list[tuple[int, int]], threshold: int, every: int | None, kind: str
) -> None:
    d = np.array([x for x, _ in data], dtype=np.float64)
    c = np.array([y for _, y in data])
    full = aalen_johansen(d, c, OUTCOME) if kind == "aj" else kaplan_meier(d, c == OUTCOME)
    grid = None if every is None else np.arange(every, 45, every, dtype=np.float64)
    released = coarsen_curve(full, threshold, start=0.0 if kind == "aj" else 1.0, grid=grid)
    times = released.times
    last, shared = d.max(), int(np.sum(d == d.max()))
    # where steps may fall: fixed grid points, or a last time that enough patients share
    allowed = set(full.times[full.times > 0]) if grid is None else set(grid)
    if shared >= threshold:
        allowed.add(last)
    assert times[0] == 0.0
    assert np.all(np.diff(times) > 0)
    assert set(times[1:]) <= allowed
    for j in range(1, times.size):
        # at least `threshold` events since the previous step, and as many at risk
        assert _events_in(d, c, times[j - 1], times[j]) >= threshold
        assert released.events[j] == _events_in(d, c, times[j - 1], times[j])
        assert int(np.sum(d >= times[j])) >= threshold
        # the value shown is the full estimate at that time
        assert released.values[j] == full.at(times[j]).item()
    # greedy: no allowed time up to the end could have been a step of its own
    for t in sorted(allowed):
        if 0 < t <= released.end and t not in set(times):
            previous = times[times < t].max()
            assert _events_in(d, c, previous, t) < threshold
    # the end: enough at risk there, and the next allowed time has too few (or there is none)
    if released.end > 0:
        assert int(np.sum(d >= released.end)) >= threshold
        assert released.end >= times[-1]
    later = [t for t in sorted(allowed) if t > released.end]
    if later:
        assert int(np.sum(d >= later[0])) < threshold


def _cohort(days: list[int], codes: list[int]) -> pl.DataFrame:
    return pl.DataFrame(
        {
            "at_risk_x": [True] * len(days),
            "incident_x": [c == 1 for c in codes],
            "days_to_x": [d if c == 1 else None for d, c in zip(days, codes, strict=True)],
            "followup_days": days,
            "end_reason": ["death" if c == 2 else "horizon" for c in codes],
        }
    )


def test_report_curves_step_only_on_the_grid_with_enough_events() -> None:
    rng = np.random.default_rng(7)
    days = rng.integers(1, 1461, 400).tolist()
    codes = rng.choice([0, 1, 2], 400, p=[0.6, 0.3, 0.1]).tolist()
    cohort = _cohort([*days, *[1461] * 50], [*codes, *[0] * 50])
    aj_t, aj_v, _, _, km_t, km_v = outcome_curves(cohort, "x", 5).years()
    d, c = np.asarray(cohort["followup_days"]), np.asarray(codes + [0] * 50)
    step_days = np.round(aj_t * DAYS_PER_YEAR, 6)
    assert np.array_equal(aj_t, km_t)  # the two curves share events and risk sets
    assert all(t % CURVE_GRID_DAYS == 0 or t == 1461 for t in step_days)
    assert step_days[-1] == 1461  # 50 patients reach the horizon
    jumps = np.flatnonzero(np.diff(aj_v) > 0) + 1
    assert jumps.size > 10
    for j in jumps:
        assert _events_in(d, c, step_days[j - 1], step_days[j]) >= 5
    full = aalen_johansen(d, c, OUTCOME)
    assert aj_v[jumps] == pytest.approx(full.at(step_days[jumps]))
    km = kaplan_meier(d, c == OUTCOME)
    assert km_v[jumps] == pytest.approx(1 - km.at(step_days[jumps]))
    # the flat end holds the last step's value: fewer than 5 events after it are not shown
    assert aj_v[-1] == aj_v[jumps[-1]]
    assert km_v[-1] == km_v[jumps[-1]]


def test_the_note_under_the_curves_names_the_threshold() -> None:
    note = curve_note(7)
    assert "at least 7 events" in note
    assert f"every {CURVE_GRID_DAYS} days" in note
    assert "fewer than 7 patients are at risk" in note
