"""Table 1 as released: no single patient's value, and no mean that differencing would undo."""

from __future__ import annotations

import polars as pl
import pytest

from pipeline.outputs._report_suppression import hidden_keys
from pipeline.outputs._report_table_one import (
    differenced_means,
    table_one_blocks,
    table_one_summary,
)

# 20 patients at risk of x (6 incident), 2 not at risk (prevalent): the "not at risk" group has
# 2 ages, below the threshold of 5.
AGES = [40 + 2 * i for i in range(20)] + [90, 44]
COHORT = pl.DataFrame(
    {
        "patient_id": list(range(22)),
        "age_at_index": AGES,
        "prevalent_x": [False] * 20 + [True] * 2,
        "at_risk_x": [True] * 20 + [False] * 2,
        "incident_x": [i < 6 for i in range(20)] + [None, None],
    }
)


def _published(threshold: int = 5) -> pl.DataFrame:
    long, *parts = table_one_blocks(COHORT, "x")
    hidden = hidden_keys(parts, threshold, COHORT, ["x"])
    no_means = differenced_means([long], threshold)
    return table_one_summary("x", long, parts, hidden, threshold, no_means).filter(
        pl.col("variable") == "age_at_index"
    )


def test_a_small_group_hides_the_means_of_every_group() -> None:
    # Shown means would give the two hidden ages' sum by subtraction (by hand):
    # overall 22 * mean - 6 * incident mean - 14 * non-incident mean = 90 + 44 = 134.
    ages = COHORT["age_at_index"]
    at_risk = COHORT["at_risk_x"]
    assert ages.sum() - ages.filter(at_risk).sum() == 134
    published = _published()
    assert published["mean"].to_list() == [None] * 4
    assert published["sd"].to_list() == [None] * 4
    # medians do not add up: kept for groups of at least 5 values, the small group has none
    by_group = dict(zip(published["group"], published["median"], strict=True))
    assert by_group["overall"] == pytest.approx(float(pl.Series(AGES).median()))
    assert by_group["incident_x=null"] is None


def test_means_stay_when_no_group_is_small() -> None:
    long = table_one_blocks(COHORT, "x")[0]
    assert differenced_means([long], 3) == {"age_at_index"}  # 2 values: one below 3
    assert differenced_means([long], 2) == frozenset()  # 2 values: at the threshold
    assert None not in _published(threshold=2)["mean"].to_list()


def test_no_minimum_or_maximum_is_released() -> None:
    published = _published(threshold=2)
    assert not {"min", "max"} & set(published.columns)
    shown = {v for c in ("mean", "median", "q1", "q3") for v in published[c].to_list()}
    assert not {min(AGES), max(AGES)} & shown
