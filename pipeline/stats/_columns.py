"""Checks and column names shared by the statistics on the analysis table.

The analysis table (``cohort.parquet``) names outcome columns by a fixed pattern, one set per
outcome ``X``: ``prevalent_X``, ``at_risk_X``, ``incident_X`` (null when not at risk),
``onset_X``, ``days_to_X``, ``time_X`` and ``event_X``. The pattern is spelt once, in
:mod:`pipeline.compile.names` (which imports nothing of the package); this module and the
other statistics ask it for the names.
"""

from __future__ import annotations

from collections.abc import Iterable

import polars as pl

from pipeline.compile import names

OUTCOME_PREFIXES = names.OUTCOME_PREFIXES
"""Prefixes of the per-outcome columns, in the order the analysis table writes them."""

FOLLOWUP_COLUMNS = names.FOLLOWUP_COLUMNS
"""Columns describing follow-up after the index date (not baseline characteristics)."""


def require_columns(cohort: pl.DataFrame, columns: Iterable[str], *, what: str) -> None:
    """Fail with one clear message naming every missing column.

    Args:
        cohort: The analysis table.
        columns: Columns the caller needs.
        what: What the columns are needed for, used in the message.

    Raises:
        ValueError: If any column is missing.
    """
    missing = [c for c in columns if c not in cohort.columns]
    if missing:
        raise ValueError(f"{what} needs column(s) {', '.join(missing)}, not in the table")


def at_risk_rows(cohort: pl.DataFrame, outcomes: Iterable[str], *, what: str) -> pl.DataFrame:
    """Return the patients at risk of every outcome, checking their incident flag is known.

    Args:
        cohort: The analysis table.
        outcomes: Outcome names ``X`` (columns ``at_risk_X`` and ``incident_X`` must exist).
        what: What the rows are needed for, used in messages.

    Returns:
        The rows with ``at_risk_X`` true for every outcome.

    Raises:
        ValueError: If a column is missing, or an at-risk patient has a null ``incident_X``
            (the analysis table promises a value there, so a null means a broken input).
    """
    outcomes = list(outcomes)
    columns = [names.outcome_columns(o) for o in outcomes]
    require_columns(cohort, [n for c in columns for n in (c.at_risk, c.incident)], what=what)
    rows = cohort.filter(
        pl.all_horizontal(pl.col(c.at_risk).fill_null(value=False) for c in columns)
    )
    for o, c in zip(outcomes, columns, strict=True):
        nulls = rows[c.incident].null_count()
        if nulls:
            raise ValueError(f"{what}: {nulls} patient(s) at risk of {o} have a null {c.incident}")
    return rows
