"""Outcome combinations: which sets of outcomes patients develop within the horizon.

Multimorbidity patterns are counted among patients at risk of *every* listed outcome at the
index date, so each patient could in principle have developed any combination. Each patient is
counted once, under the exact set of outcomes that were incident for them (a patient with
diabetes and CKD counts under "type2_diabetes+ckd", not also under "type2_diabetes").
"""

from __future__ import annotations

from collections.abc import Sequence

import polars as pl

from pipeline.compile import names
from pipeline.stats._columns import at_risk_rows

__all__ = ["COMBINATIONS_SCHEMA", "NO_OUTCOME", "outcome_combinations"]

NO_OUTCOME = "none"
"""Name of the empty combination (no incident outcome), listed only when asked for."""

COMBINATIONS_SCHEMA: dict[str, pl.DataType] = {
    "combination": pl.String(),
    "outcomes": pl.Int64(),
    "n": pl.Int64(),
}
"""Columns of :func:`outcome_combinations`: the "+"-joined name, its size and the count."""


def outcome_combinations(
    cohort: pl.DataFrame, outcomes: Sequence[str], *, include_none: bool = False
) -> pl.DataFrame:
    """Count patients by the exact combination of incident outcomes within the horizon.

    Args:
        cohort: The analysis table.
        outcomes: Outcome names; their order fixes the order of names inside a combination
            (``["type2_diabetes", "ckd"]`` gives ``"type2_diabetes+ckd"``).
        include_none: Also count patients with no incident outcome, as :data:`NO_OUTCOME`.

    Returns:
        One row per combination observed at least once (schema :data:`COMBINATIONS_SCHEMA`),
        sorted by count descending, then by name.

    Raises:
        ValueError: If ``outcomes`` is empty or repeats a name, a column is missing, or an
            at-risk patient has a null incident flag.

    Examples:
        >>> cohort = pl.DataFrame(
        ...     {
        ...         "at_risk_a": [True, True, True, True],
        ...         "incident_a": [True, True, False, True],
        ...         "at_risk_b": [True, True, True, False],
        ...         "incident_b": [True, False, False, None],
        ...     }
        ... )
        >>> outcome_combinations(cohort, ["a", "b"]).rows()
        [('a', 1, 1), ('a+b', 2, 1)]
    """
    outcomes = list(outcomes)
    if not outcomes or len(set(outcomes)) != len(outcomes):
        raise ValueError(f"outcomes must be a non-empty list of distinct names, got {outcomes}")
    rows = at_risk_rows(cohort, outcomes, what="outcome combinations")
    incident = pl.concat_list(
        pl.when(pl.col(names.outcome_columns(o).incident))
        .then(pl.lit(o))
        .otherwise(pl.lit(None, pl.String))
        for o in outcomes
    ).list.drop_nulls()
    combos = (
        rows.select(
            incident.list.join("+").alias("combination"),
            incident.list.len().cast(pl.Int64).alias("outcomes"),
        )
        .group_by("combination", "outcomes")
        .agg(pl.len().cast(pl.Int64).alias("n"))
        .with_columns(
            pl.when(pl.col("outcomes") == 0)
            .then(pl.lit(NO_OUTCOME))
            .otherwise(pl.col("combination"))
            .alias("combination")
        )
    )
    if not include_none:
        combos = combos.filter(pl.col("outcomes") > 0)
    return (
        combos.sort(["n", "combination"], descending=[True, False])
        .select(list(COMBINATIONS_SCHEMA))
        .cast(COMBINATIONS_SCHEMA)
    )  # type: ignore[arg-type]
