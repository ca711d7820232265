"""Table 1 by exposure group (a new-user study): exact values on a hand-made cohort.

Twelve patients, seven starting dpp4 and five sglt2; one dpp4 patient has x at index (not at
risk). Every expected number below is worked out by hand from the table.
"""

from __future__ import annotations

import math

import polars as pl

from pipeline.outputs.report._suppression import hidden_keys
from pipeline.outputs.report._table_one import (
    differenced_means,
    exposure_table_one_blocks,
    exposure_table_one_summary,
    table_one_blocks,
    table_one_summary,
)
from pipeline.stats import baseline_variables

DPP4_AGES = [50, 52, 54, 56, 58, 60, 62]
SGLT2_AGES = [41, 43, 45, 47, 49]
COHORT = pl.DataFrame(
    {
        "patient_id": list(range(12)),
        "sex": ["F", "M", "F", "M", "F", "M", "F", "F", "M", "F", "M", "F"],
        "exposure": ["dpp4"] * 7 + ["sglt2"] * 5,
        "age_at_index": DPP4_AGES + SGLT2_AGES,
        "smoker": [True, False, False, True, False, False, False, True, True, False, False, False],
        "prevalent_x": [False] * 6 + [True] + [False] * 5,
        "at_risk_x": [True] * 6 + [False] + [True] * 5,
        "incident_x": [
            True,
            False,
            False,
            False,
            False,
            False,
            None,
            True,
            True,
            False,
            False,
            False,
        ],
    }
)


def _published(threshold: int) -> tuple[pl.DataFrame, pl.DataFrame]:
    """The exposure Table 1 and the outcome's Table 1, suppressed as one system."""
    long, *parts = exposure_table_one_blocks(COHORT)
    x_long, *x_parts = table_one_blocks(COHORT, "x")
    hidden = hidden_keys([*x_parts, *parts], threshold, COHORT, ["x"])
    no_means = differenced_means([x_long, long], threshold)
    return (
        exposure_table_one_summary(long, parts, hidden, threshold, no_means),
        table_one_summary("x", x_long, x_parts, hidden, threshold, no_means),
    )


def _cell(table: pl.DataFrame, variable: str, level: str | None, group: str) -> dict:
    level_is = pl.col("level").is_null() if level is None else pl.col("level") == level
    rows = table.filter(pl.col("variable") == variable, level_is, pl.col("group") == group)
    assert rows.height == 1, (variable, level, group)
    return rows.row(0, named=True)


def test_one_column_per_group_plus_overall_with_exact_counts() -> None:
    table, _ = _published(threshold=1)
    assert set(table["by"]) == {"exposure"}
    assert list(dict.fromkeys(table["group"])) == ["overall", "exposure=dpp4", "exposure=sglt2"]
    sizes = [_cell(table, "patients", None, g)["n"] for g in dict.fromkeys(table["group"])]
    assert sizes == ["12", "7", "5"]
    # smokers: patients 0 and 3 of dpp4 (2 of 7), 7 and 8 of sglt2 (2 of 5)
    smokers = [_cell(table, "smoker", "true", g) for g in ("overall", "exposure=dpp4")]
    assert [(r["n"], r["percent"]) for r in smokers] == [("4", 33.3), ("2", 28.6)]
    assert _cell(table, "smoker", "true", "exposure=sglt2")["percent"] == 40.0
    # the grouping column is not a row of its own table; the other outcome states are
    assert "exposure" not in set(table["variable"])
    assert _cell(table, "prevalent_x", "true", "exposure=dpp4")["n"] == "1"


def test_numeric_summaries_and_smd_by_hand() -> None:
    table, _ = _published(threshold=1)
    dpp4 = _cell(table, "age_at_index", None, "exposure=dpp4")
    sglt2 = _cell(table, "age_at_index", None, "exposure=sglt2")
    assert (dpp4["mean"], dpp4["median"], dpp4["q1"], dpp4["q3"]) == (56.0, 56.0, 53.0, 59.0)
    assert (sglt2["mean"], sglt2["median"], sglt2["q1"], sglt2["q3"]) == (45.0, 45.0, 43.0, 47.0)
    # sample SDs: 2 * sd(0..6) = 2 * sqrt(28 / 6), 2 * sd(0..4) = 2 * sqrt(10 / 4)
    sd1, sd0 = 2 * math.sqrt(28 / 6), 2 * math.sqrt(10 / 4)
    assert dpp4["sd"] == round(sd1, 2)
    overall = _cell(table, "age_at_index", None, "overall")
    assert overall["mean"] == round(617 / 12, 2)
    # Austin 2009: dpp4 (the first group) against sglt2, on the overall row only
    assert overall["smd"] == round((56 - 45) / math.sqrt((sd1**2 + sd0**2) / 2), 3)
    assert dpp4["smd"] is None
    women = _cell(table, "sex", "F", "overall")["smd"]  # 4 of 7 against 3 of 5
    p1, p0 = 4 / 7, 3 / 5
    assert women == round((p1 - p0) / math.sqrt((p1 * (1 - p1) + p0 * (1 - p0)) / 2), 3)


def test_small_counts_are_hidden_and_linked_with_the_outcome_table() -> None:
    table, by_x = _published(threshold=3)
    # 2 smokers in each group: both below 3, so hidden; their percentages go with them
    for group in ("exposure=dpp4", "exposure=sglt2"):
        smoker = _cell(table, "smoker", "true", group)
        assert (smoker["n"], smoker["percent"]) == ("<3", None)
    # the one dpp4 patient with x at index is the outcome table's whole "not at risk" group:
    # hidden in both tables, since the exposure table's 0 sglt2 prevalent patients would give
    # it back from the other
    assert _cell(table, "prevalent_x", "true", "exposure=dpp4")["n"] == "<3"
    assert _cell(table, "prevalent_x", "true", "exposure=sglt2")["n"] == "0"
    assert _cell(by_x, "patients", None, "incident_x=null")["n"] == "<3"
    # the not-at-risk group has one age, so the overall mean less the others' would give it:
    # no mean in any group of either table; medians stay where 3 or more ages contribute
    ages = table.filter(pl.col("variable") == "age_at_index")
    assert ages["mean"].to_list() == [None] * 3
    assert ages["median"].to_list() == [51.0, 56.0, 45.0]
    # the group sizes (7 and 5) are shown: they are at or above the threshold
    assert [
        _cell(table, "patients", None, g)["n"] for g in ("exposure=dpp4", "exposure=sglt2")
    ] == [
        "7",
        "5",
    ]


def test_three_groups_have_no_smd() -> None:
    cohort = COHORT.with_columns(pl.Series("exposure", ["dpp4"] * 5 + ["glp1"] * 2 + ["sglt2"] * 5))
    long, *parts = exposure_table_one_blocks(cohort)
    table = exposure_table_one_summary(long, parts, frozenset(), 1)
    assert list(dict.fromkeys(table["group"])) == [
        "overall",
        "exposure=dpp4",
        "exposure=glp1",
        "exposure=sglt2",
    ]
    assert table["smd"].drop_nulls().is_empty()


def test_as_treated_columns_are_not_baseline_characteristics() -> None:
    # follow-up as treated ends after index: no row of either Table 1
    cohort = COHORT.with_columns(
        pl.lit(30).alias("followup_days_as_treated"),
        pl.lit("discontinued").alias("end_reason_as_treated"),
    )
    long, *_ = exposure_table_one_blocks(cohort)
    assert set(long["variable"]) == {"sex", "age_at_index", "smoker", "prevalent_x"}
    assert baseline_variables(cohort) == [
        "sex",
        "exposure",
        "age_at_index",
        "smoker",
        "prevalent_x",
    ]
