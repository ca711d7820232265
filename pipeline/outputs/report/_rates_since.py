"""The rates by time since index: each outcome's events and person-years per since-index band.

Only when the study split follow-up by time since index (``persontime: since_index_years``,
the ``since_index_band`` column of ``persontime.parquet``). Each band is summed over all ages
and calendar years, so the bands of an outcome add up to its total (the ``all``/``all`` row of
the rates table, itself tied to the incidence table's incident cases): that is the relation
given to the suppression system, and a hidden band can be worked out from neither.

Rows carry the rates table's columns, with ``age_band`` and ``calendar_year`` ``all`` and the
band in ``since_index`` (``all`` on every other row of the table).
"""

from __future__ import annotations

from typing import Any

import polars as pl

from pipeline.compile import names
from pipeline.stats import DAYS_PER_YEAR

__all__ = ["SINCE", "SINCE_COLUMN", "since_index_rows"]

SINCE = "since_index_band"
"""The person-time table's column of the time-since-index band (``0-1``, ``1-3``, ``3+``)."""

SINCE_COLUMN = "since_index"
"""The rates table's column for it: the band, or ``all`` for rows over every band."""

_ALL = "all"


def _lower(label: str) -> int:
    return int(label.rstrip("+").split("-")[0])


def since_index_rows(
    persontime: pl.DataFrame, outcome: str, total_key: str
) -> tuple[list[dict[str, Any]], tuple[tuple[str, int], ...] | None]:
    """One outcome's rows by time since index, and their relation to the outcome's total.

    Args:
        persontime: The build's person-time table.
        outcome: The outcome.
        total_key: The suppression key of the outcome's total events.

    Returns:
        The rows (with ``events#key``), in band order, and the relation ``total = sum of the
        bands`` (None when the table has no since-index split).
    """
    if SINCE not in persontime.columns:
        return [], None
    days, events = names.persontime_columns(outcome)
    cells = (
        persontime.filter(pl.col(days).is_not_null())
        .group_by(SINCE)
        .agg(
            pl.col(events).cast(pl.Int64).sum().alias("events"),
            (pl.col(days).cast(pl.Float64).sum() / DAYS_PER_YEAR).alias("person_years"),
        )
    )
    ordered = sorted(cells.iter_rows(named=True), key=lambda r: _lower(r[SINCE]))
    rows = [
        {
            "outcome": outcome,
            "age_band_start": -1,
            "age_band": _ALL,
            "calendar_year": _ALL,
            SINCE_COLUMN: r[SINCE],
            "events": int(r["events"]),
            "person_years": float(r["person_years"]),
            "events#key": f"pt|{outcome}|since|{r[SINCE]}",
        }
        for r in ordered
    ]
    relation = ((total_key, -1), *((r["events#key"], 1) for r in rows))
    return rows, relation
