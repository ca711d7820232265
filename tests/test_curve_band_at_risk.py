"""The band around the released curve, the headline it implies, and the numbers at risk.

The hand-computed values were worked out on paper from the delta-method variance of the
Aalen-Johansen estimate (Collett 2015, section 12.2, as written in ``_cif_interval``) and by
counting the ten patients below; the code under test is not used to get them.
"""

from __future__ import annotations

import math

import polars as pl
import pytest
from scipy import stats

from pipeline.outputs.report._at_risk import (
    BIN_FIELDS,
    END,
    at_risk_block,
    at_risk_days,
    render_at_risk,
)
from pipeline.outputs.report._curves import band_note, outcome_curves
from pipeline.outputs.report._suppression import Block, hidden_keys
from pipeline.outputs.report._tables import incidence_block
from pipeline.stats import cumulative_incidence_at_horizon, protect_cells
from pipeline.stats._disclosure import feasible_range

# 10 patients; codes: 1 outcome, 2 death first, 0 censored (as in test_curve_release).
DURATIONS = [2, 3, 3, 4, 5, 6, 8, 9, 10, 10]
CODES = [1, 2, 1, 1, 0, 1, 1, 0, 1, 0]


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


def _loglog(f: float, variance: float) -> tuple[float, float]:
    """The log(-log) interval, written out again from its formula (Collett 2015)."""
    z = stats.norm.ppf(0.975)
    se = math.sqrt(variance) / (f * abs(math.log(f)))
    return f ** math.exp(z * se), f ** math.exp(-z * se)


def test_hand_computed_band_at_each_released_step(monkeypatch: pytest.MonkeyPatch) -> None:
    # Grid of 2 days (the report uses 30), threshold 2: the curve steps at 4 (3 events) and 8.
    monkeypatch.setattr("pipeline.outputs.report._curves.CURVE_GRID_DAYS", 2)
    curves = outcome_curves(_cohort(DURATIONS, CODES), "x", 2)
    assert curves.aj.times.tolist() == [0.0, 4.0, 8.0]
    # Up to day 4, event times 2 (n 10, 1 event, of the outcome), 3 (n 9, 2 events, 1 of
    # the outcome), 4 (n 7, 1 of the outcome); survival before them 1, 0.9, 0.7; F(4) = 0.3,
    # F at them 0.1, 0.2, 0.3. Variance at 4:
    #   (0.2^2 * 1/(10*9) + 0.1^2 * 2/(9*7))            = 0.000761905
    # + (1 * 1*9/10^3 + 0.81 * 1*8/9^3 + 0.49 * 1*6/7^3) = 0.026460317
    # - 2 (0.2 * 1 * 1/10^2 + 0.1 * 0.9 * 1/9^2)         = 0.006222222   -> 0.021
    assert curves.band.estimate[1] == pytest.approx(0.3)
    assert curves.band.variance[1] == pytest.approx(0.021)
    low, high = _loglog(0.3, 0.021)
    assert (curves.band.low[1], curves.band.high[1]) == pytest.approx((low, high))
    assert (round(low, 4), round(high, 4)) == (0.0711, 0.5779)
    # At day 0 the band is the point 0; the band follows the released steps, then holds.
    drawn_low, drawn_high = curves.band_limits()
    assert drawn_low[0] == drawn_high[0] == 0.0
    assert drawn_low.size == curves.aj.drawn()[0].size == 4  # 0, 4, 8 and the flat end at 10
    assert (drawn_low[-1], drawn_high[-1]) == (drawn_low[-2], drawn_high[-2])
    # the curve and the band's centre are the same numbers
    assert curves.band.estimate.tolist() == pytest.approx(curves.aj.values.tolist())


def test_headline_is_the_band_at_the_last_step_and_the_horizon_estimate_when_they_meet() -> None:
    # 40 patients with one outcome event each 30 days from day 30 on, 50 followed to day 1461,
    # 5 of them with the outcome on day 1461 itself: the curve's last step is the horizon.
    days = [30 * (i + 1) for i in range(40)] + [1461] * 50
    codes = [1 if i % 4 == 0 else 0 for i in range(40)] + [1] * 5 + [0] * 45
    cohort = _cohort(days, codes)
    curves = outcome_curves(cohort, "x", 5)
    headline = curves.headline
    assert headline.days == 1461.0 == curves.aj.times[-1]
    full = cumulative_incidence_at_horizon(cohort, "x")
    assert (headline.estimate, headline.low, headline.high) == pytest.approx(
        (full.estimate, full.low, full.high)
    )
    assert (headline.low, headline.high) == (curves.band.low[-1], curves.band.high[-1])


def test_headline_stops_at_the_last_step_when_few_events_follow_it() -> None:
    # Events on days 30, 150, ..., 1110 (10), then 2 more on 1200 and 1300, and 50 followed to
    # day 1461 without one: the curve's last step is at 1110 (the 10th event); the 2 after it
    # are fewer than 5, so the horizon estimate, which counts them, is not released.
    days = [30 + 120 * i for i in range(10)] + [1200, 1300] + [1461] * 50
    codes = [1] * 12 + [0] * 50
    cohort = _cohort(days, codes)
    curves = outcome_curves(cohort, "x", 5)
    headline = curves.headline
    assert headline.days == curves.aj.times[-1] < 1461
    full = cumulative_incidence_at_horizon(cohort, "x")
    assert headline.estimate < full.estimate
    assert headline.estimate == curves.aj.values[-1]
    events_after = sum(1 for d, c in zip(days, codes, strict=True) if c == 1 and d > headline.days)
    assert 0 < events_after < 5


def test_a_curve_without_steps_has_no_headline() -> None:
    curves = outcome_curves(_cohort([10, 20, 30, 40], [1, 0, 0, 0]), "x", 5)
    assert math.isnan(curves.headline.estimate)
    assert math.isnan(curves.headline.days)


def test_band_caption_names_the_method() -> None:
    note = band_note()
    assert note.startswith("The shaded band is a pointwise 95% confidence interval")
    assert "delta-method variance given by Collett 2015, on the log(−log) scale" in note
    assert "the curve's value at its last step" in note


def test_at_risk_days_are_whole_years_from_index() -> None:
    assert at_risk_days(1461) == [0, 365, 730, 1095, 1461]
    assert at_risk_days(1460) == [0, 365, 730, 1095]
    assert at_risk_days(0) == [0]


def _table(block: Block, outcome: str = "x") -> dict[tuple[str, str], int]:
    frame = block.frame.filter(pl.col("outcome") == outcome)
    return {(r["day"], r["field"]): r["n"] for r in frame.iter_rows(named=True)}


def _keys(block: Block) -> dict[tuple[str, str], str]:
    return {(r["day"], r["field"]): r["n#key"] for r in block.frame.iter_rows(named=True)}


def test_hand_counted_numbers_at_risk() -> None:
    # Follow-up in days (code): 0 (death), 100 (event), 365 (event), 365 (censored),
    # 400 (event), 700 (censored), 730 (event), 800 (death): longest 800, so columns 0, 365,
    # 730 and End.
    days = [0, 100, 365, 365, 400, 700, 730, 800]
    codes = [2, 1, 1, 0, 1, 0, 1, 2]
    block = at_risk_block(_cohort(days, codes), ["x"])
    assert _table(block) == {
        ("0", "at_risk"): 8,  # everyone is followed to day 0
        ("365", "at_risk"): 6,  # all but the death on day 0 and the event on day 100
        ("365", "events"): 1,  # day 100
        ("365", "left"): 1,  # the death on day 0
        ("730", "at_risk"): 2,  # days 730 and 800
        ("730", "events"): 3,  # days 100, 365, 400
        ("730", "left"): 3,  # days 0, 365, 700
        (END, "events"): 4,
        (END, "left"): 4,
        # the bins, never printed: follow-up ending in [0, 365), [365, 730), from 730 on
        ("0", "events_in"): 1,
        ("0", "left_in"): 1,
        ("365", "events_in"): 2,
        ("365", "left_in"): 2,
        ("730", "events_in"): 1,
        ("730", "left_in"): 1,
    }
    # at risk on a day = at risk at 0 - events before it - censored or died before it
    table = _table(block)
    for day in ("365", "730"):
        assert table[(day, "at_risk")] == 8 - table[(day, "events")] - table[(day, "left")]
    # day 0 and End are the incidence table's own counts (one key each)
    keys = _keys(block)
    assert keys[("0", "at_risk")] == "atrisk|x"
    assert (keys[(END, "events")], keys[(END, "left")]) == ("events|x", "nonevents|x")
    assert block.unprinted == {
        keys[(d, f)] for d in ("0", "365", "730") for f in BIN_FIELDS.values()
    }
    # every relation holds for the counts (protect_cells checks each)
    values = dict(zip(block.frame["n#key"], block.frame["n"], strict=True))
    protect_cells(values, block.relations, 1)


def test_end_follows_the_horizon_column_with_the_events_on_its_day() -> None:
    days = [100, 1461, 1461, 1461]
    block = at_risk_block(_cohort(days, [1, 1, 0, 0]), ["x"])
    table = _table(block)
    assert (table[("1461", "at_risk")], table[("1461", "events")]) == (3, 1)
    assert (table[(END, "events")], table[("1461", "events_in")]) == (2, 1)


def test_small_numbers_at_risk_are_hidden_with_complements() -> None:
    # 60 at risk: 3 events in the first year, then nobody leaves before day 1461, where 9 have
    # the outcome. At risk at 0, 60, and at one year, 57, with nobody censored: the 3 events
    # before day 365 would be 60 - 57 - 0, so a shown count must be hidden with them; and the
    # bin of those 3 (never printed) is protected as well.
    days = [50, 120, 300, *[1461] * 57]
    codes = [1, 1, 1, *[1] * 9, *[0] * 48]
    cohort = _cohort(days, codes).with_columns(prevalent_x=pl.lit(value=False))
    _, incidence = incidence_block(cohort, ["x"])
    block = at_risk_block(cohort, ["x"])
    hidden = hidden_keys([incidence, block], 5, cohort, ["x"])
    assert {"ar|x|365|events", "arbin|x|0|events"} <= hidden
    assert "ar|x|365|at_risk" in hidden  # the complement: "left" is 0, at risk at 0 is needed
    values = incidence.values() | dict(zip(block.frame["n#key"], block.frame["n"], strict=True))
    relations = [*incidence.all_relations(), *block.relations]
    for cell in ("ar|x|365|events", "arbin|x|0|events"):
        low, high = feasible_range(cell, values, relations, hidden | block.unprinted)
        assert high - low >= 5, (cell, low, high)
    html = render_at_risk(block, "x", hidden, 5).replace("&lt;", "<")
    assert 'data-day="365" data-count="events" class="num n"><5<' in html
    assert "events_in" not in html
