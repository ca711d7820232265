"""Table 1 as released: no single patient's value, and no mean that differencing would undo."""

from __future__ import annotations

import polars as pl
import pytest

from pipeline.outputs.report._suppression import hidden_keys
from pipeline.outputs.report._table_one import (
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


def test_smd_by_hand_and_withheld_with_its_statistics() -> None:
    # Austin 2009 by hand: incident ages 40..50 (step 2), not incident 52..78.
    long, *parts = table_one_blocks(COHORT, "x")
    hidden = hidden_keys(parts, 2, COHORT, ["x"])
    published = table_one_summary("x", long, parts, hidden, 2, frozenset())
    incident = pl.Series([40 + 2 * i for i in range(6)], dtype=pl.Float64)
    other = pl.Series([40 + 2 * i for i in range(6, 20)], dtype=pl.Float64)
    pooled = ((incident.std() ** 2 + other.std() ** 2) / 2) ** 0.5  # type: ignore[operator]
    expected = (incident.mean() - other.mean()) / pooled  # type: ignore[operator]
    ages = published.filter(pl.col("variable") == "age_at_index")
    smd = dict(zip(ages["group"], ages["smd"], strict=True))
    assert smd["overall"] == pytest.approx(round(expected, 3))
    assert smd["incident_x=true"] is None  # one SMD per row of the table, on the overall row
    prevalent = published.filter(pl.col("variable") == "prevalent_x", pl.col("group") == "overall")
    # prevalent_x is not a Table 1 variable of its own outcome; none of the rows is a patient
    assert prevalent.is_empty()
    # With the means withheld (a small group, threshold 5), the SMD goes with them.
    assert _published()["smd"].to_list() == [None] * 4


def test_smd_of_a_category_is_withheld_with_its_percentages() -> None:
    cohort = COHORT.with_columns(
        pl.Series("smoker", [i % 3 == 0 for i in range(20)] + [True, False])
    )
    long, *parts = table_one_blocks(cohort, "x")
    for threshold, shown in ((1, True), (5, False)):
        hidden = hidden_keys(parts, threshold, cohort, ["x"])
        out = table_one_summary("x", long, parts, hidden, threshold, frozenset())
        row = out.filter(
            pl.col("variable") == "smoker", pl.col("level") == "true", pl.col("group") == "overall"
        )
        if shown:  # by hand: incident 2 of 6 (i = 0, 3), not incident 5 of 14 (6, 9, ..., 18)
            p1, p0 = 2 / 6, 5 / 14
            pooled = ((p1 * (1 - p1) + p0 * (1 - p0)) / 2) ** 0.5
            assert row["smd"][0] == pytest.approx(round((p1 - p0) / pooled, 3))
        else:  # incident smokers (2) are hidden, so the percentages are, and so is the SMD
            assert row["smd"][0] is None
