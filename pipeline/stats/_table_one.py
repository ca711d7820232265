"""Table 1: baseline characteristics, overall and by a grouping column.

The result is a long table with one row per (variable, level, group), so it can be pivoted,
suppressed and rendered without knowing the variables in advance. Its schema
(:data:`TABLE_ONE_SCHEMA`):

==========  =======  =============================================================
column      type     meaning
==========  =======  =============================================================
variable    str      column of the analysis table
level       str      category (booleans give "false" and "true"); null for numeric
group       str      "overall", or ``"<by>=<value>"`` (``"<by>=null"`` for nulls)
n           int      patients in the level (categorical) or non-missing (numeric)
percent     float    100 * n / non-missing patients in the group (categorical only)
mean        float    mean (numeric only)
sd          float    sample standard deviation, ddof 1 (numeric only)
median      float    median (numeric only)
q1          float    25th percentile, linear interpolation (numeric only)
q3          float    75th percentile, linear interpolation (numeric only)
missing     int      patients in the group with no value for the variable
==========  =======  =============================================================

Rows come in the order: variables as listed; within a variable, groups ("overall" first, then
the values of ``by`` sorted with null last); within a group, levels sorted. Every level seen
anywhere appears in every group, with ``n = 0`` where absent, so groups line up and suppression
sees every cell.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import polars as pl

from pipeline.compile import names
from pipeline.stats._columns import FOLLOWUP_COLUMNS, OUTCOME_PREFIXES, require_columns

__all__ = [
    "TABLE_ONE_SCHEMA",
    "baseline_variables",
    "smd_binary",
    "smd_continuous",
    "table_one",
]

TABLE_ONE_SCHEMA: dict[str, pl.DataType] = {
    "variable": pl.String(),
    "level": pl.String(),
    "group": pl.String(),
    "n": pl.Int64(),
    "percent": pl.Float64(),
    "mean": pl.Float64(),
    "sd": pl.Float64(),
    "median": pl.Float64(),
    "q1": pl.Float64(),
    "q3": pl.Float64(),
    "missing": pl.Int64(),
}
"""Column names and types of the table returned by :func:`table_one`."""

_POST_INDEX_PREFIXES = tuple(p for p in OUTCOME_PREFIXES if p != names.PREVALENT_PREFIX)
_CATEGORICAL = (pl.String, pl.Categorical, pl.Enum, pl.Boolean)


def baseline_variables(cohort: pl.DataFrame, *, exclude: Sequence[str] = ()) -> list[str]:
    """Columns of the analysis table that describe patients at the index date.

    Kept: numeric, string, categorical and boolean columns, including ``prevalent_X``
    (conditions present at index). Dropped: ``patient_id``, dates, anything measured after the
    index date (``at_risk_X``, ``incident_X``, ``onset_X``, ``days_to_X``, ``time_X``,
    ``event_X``, follow-up columns, and every ``*_as_treated`` column of a new-user study)
    and ``exclude``.

    Args:
        cohort: The analysis table.
        exclude: Further columns to leave out (e.g. the grouping column).

    Returns:
        Column names in table order.
    """
    keep: list[str] = []
    for name, dtype in cohort.schema.items():
        if name == "patient_id" or name in exclude or name in FOLLOWUP_COLUMNS:
            continue
        if name.startswith(_POST_INDEX_PREFIXES) or name.endswith(names.AS_TREATED_SUFFIX):
            continue  # (every as-treated column describes follow-up)
        if dtype.is_numeric() or isinstance(dtype, _CATEGORICAL):
            keep.append(name)
    return keep


def _label(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    return str(value)


def _numeric_row(variable: str, group: str, values: pl.Series) -> dict[str, Any]:
    present = values.drop_nulls().cast(pl.Float64)
    n = present.len()

    def stat(x: float | None) -> float | None:
        return None if n == 0 or x is None else float(x)

    return {
        "variable": variable,
        "level": None,
        "group": group,
        "n": n,
        "percent": None,
        "mean": stat(present.mean()),  # type: ignore[arg-type]
        "sd": stat(present.std(ddof=1)) if n > 1 else None,
        "median": stat(present.median()),  # type: ignore[arg-type]
        "q1": stat(present.quantile(0.25, interpolation="linear")),
        "q3": stat(present.quantile(0.75, interpolation="linear")),
        "missing": values.null_count(),
    }


def _categorical_rows(
    variable: str, group: str, values: pl.Series, levels: list[str]
) -> list[dict[str, Any]]:
    labels = values.drop_nulls().cast(pl.String)  # booleans cast to "true" / "false"
    counts = dict(labels.value_counts().iter_rows())
    present = labels.len()
    return [
        {
            "variable": variable,
            "level": level,
            "group": group,
            "n": counts.get(level, 0),
            "percent": 100.0 * counts.get(level, 0) / present if present else None,
            "mean": None,
            "sd": None,
            "median": None,
            "q1": None,
            "q3": None,
            "missing": values.null_count(),
        }
        for level in levels
    ]


def _groups(cohort: pl.DataFrame, by: str | None) -> list[tuple[str, pl.DataFrame]]:
    groups = [("overall", cohort)]
    if by is None:
        return groups
    values = cohort[by].unique().sort(nulls_last=True).to_list()
    for value in values:
        mask = pl.col(by).is_null() if value is None else pl.col(by) == value
        groups.append((f"{by}={_label(value)}", cohort.filter(mask)))
    return groups


def table_one(
    cohort: pl.DataFrame, *, by: str | None = None, variables: Sequence[str] | None = None
) -> pl.DataFrame:
    """Describe baseline characteristics overall and within each value of ``by``.

    Numeric columns get mean (SD), median (IQR) and a missing count; categorical and boolean
    columns get a count and percentage of non-missing patients per level and a missing count.
    Percentages use non-missing patients as the denominator, so missing values are reported
    once (as ``missing``) and not as a level.

    Args:
        cohort: The analysis table.
        by: Optional grouping column, e.g. ``incident_ckd``. Patients with a null value form
            their own group (for ``incident_X``: those not at risk).
        variables: Columns to describe; defaults to :func:`baseline_variables` without ``by``.

    Returns:
        A DataFrame with schema :data:`TABLE_ONE_SCHEMA` (see the module docstring).

    Raises:
        ValueError: If ``by`` or a listed variable is not in the table, or a variable has a
            type that is neither numeric nor categorical.

    Examples:
        >>> cohort = pl.DataFrame({"age": [50, 60, None], "sex": ["F", "M", "F"]})
        >>> t = table_one(cohort)
        >>> t.select("variable", "level", "n", "mean", "missing").rows()
        [('age', None, 2, 55.0, 1), ('sex', 'F', 2, None, 0), ('sex', 'M', 1, None, 0)]
    """
    if by is not None:
        require_columns(cohort, [by], what="table_one(by=...)")
    if variables is None:
        variables = baseline_variables(cohort, exclude=[by] if by else [])
    require_columns(cohort, variables, what="table_one")
    groups = _groups(cohort, by)
    rows: list[dict[str, Any]] = []
    for variable in variables:
        dtype = cohort.schema[variable]
        if dtype.is_numeric():
            rows.extend(_numeric_row(variable, name, g[variable]) for name, g in groups)
        elif isinstance(dtype, _CATEGORICAL):
            if dtype == pl.Boolean:
                levels = ["false", "true"]
            else:
                levels = sorted(cohort[variable].drop_nulls().cast(pl.String).unique().to_list())
            for name, g in groups:
                rows.extend(_categorical_rows(variable, name, g[variable], levels))
        else:
            raise ValueError(f"table_one cannot describe {variable!r} of type {dtype}")
    return pl.DataFrame(rows, schema=TABLE_ONE_SCHEMA, orient="row")


def smd_continuous(mean_1: float, sd_1: float, mean_0: float, sd_0: float) -> float:
    """Standardised mean difference of a continuous variable between two groups (Austin 2009).

    ``(mean_1 - mean_0) / sqrt((sd_1^2 + sd_0^2) / 2)``: the difference in units of the
    groups' average spread, comparable across variables and unaffected by the groups' sizes
    (a t statistic grows with them). Austin, *Stat Med* 2009; 28:3083, equation 1.

    Returns:
        The SMD; NaN when both SDs are 0 or an input is missing (NaN).

    Examples:
        >>> round(smd_continuous(30.0, 5.0, 28.0, 3.0), 6)
        0.485071
    """
    pooled = math.sqrt((sd_1 * sd_1 + sd_0 * sd_0) / 2.0)
    if not pooled > 0:
        return math.nan
    return (mean_1 - mean_0) / pooled


def smd_binary(p_1: float, p_0: float) -> float:
    """Standardised difference of a proportion between two groups (Austin 2009, equation 2).

    ``(p_1 - p_0) / sqrt((p_1 (1 - p_1) + p_0 (1 - p_0)) / 2)``; for a categorical variable
    each level is compared as its own binary indicator.

    Returns:
        The SMD; NaN when both proportions are 0 or both 1.

    Examples:
        >>> round(smd_binary(0.4, 0.25), 6)
        0.324443
    """
    pooled = math.sqrt((p_1 * (1.0 - p_1) + p_0 * (1.0 - p_0)) / 2.0)
    if not pooled > 0:
        return math.nan
    return (p_1 - p_0) / pooled
