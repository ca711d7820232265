"""The report's observed and expected events and SMRs against the study's reference rates.

Only when the study names a reference rate table (``persontime: reference_rates:``, read by
:mod:`pipeline.config._reference_rates`) and the build wrote ``persontime.parquet``. For each
outcome the table names, the cohort's days at risk are summed by the study's age band (and by
sex, from ``cohort.parquet``, and calendar year when the table is by them); each cell's
person-years times the table's rate for the band holding it gives the expected events, and
:func:`pipeline.stats.standardised_ratio` the ratio with its exact Poisson interval (the
expected count fixed, the observed one Poisson).

Suppression: the observed count is the outcome's total events of the rates table, so it takes
that row's key and is one cell of the report's linked system (it adds no new count). When it is
hidden, the ratio and its interval are left out, since the ratio times the expected count gives
it back; the expected count is shown (person-time times rates, not a count of patients).
"""

from __future__ import annotations

import math
from typing import Any

import polars as pl

from pipeline.compile import names
from pipeline.config import LoadedStudy
from pipeline.config._reference_rates import ReferenceRates, stratum_label
from pipeline.errors import AscertainError
from pipeline.outputs._manifest import sha256_file
from pipeline.outputs.report._rates_since import SINCE_COLUMN
from pipeline.outputs.report._suppression import Block, shown
from pipeline.stats import DAYS_PER_YEAR, parse_age_band, standardised_ratio

__all__ = ["changed_reference", "expected_cells", "smr_summary"]

_ALL = "all"


def expected_cells(
    persontime: pl.DataFrame, cohort: pl.DataFrame, table: ReferenceRates, outcome: str
) -> tuple[list[int], list[float], list[float]]:
    """One outcome's events, person-years and reference rate per cell of the table's strata.

    Args:
        persontime: The build's person-time table.
        cohort: The analysis table (for each patient's sex, when the table is by sex).
        table: The reference rates.
        outcome: The outcome.

    Returns:
        Events, person-years and rate per 1,000 person-years, one entry per cell, sorted.

    Raises:
        AscertainError: A cell has no rate in the table, naming its band and stratum (the
            study's load checks this, so it means the table changed since then).
    """
    days, events = names.persontime_columns(outcome)
    frame = persontime.filter(pl.col(days).is_not_null())
    keys = ["age_band"]
    if table.by_sex:
        frame = frame.join(cohort.select("patient_id", "sex"), on="patient_id", how="left")
        keys.append("sex")
    if table.by_year:
        if "calendar_year" not in frame.columns:
            raise AscertainError(
                f"the reference rates {table.file.name} are by calendar year but the "
                "person-time table is not split by year"
            )
        keys.append("calendar_year")
    cells = (
        frame.group_by(keys)
        .agg(
            pl.col(events).cast(pl.Int64).sum().alias("events"),
            pl.col(days).cast(pl.Int64).sum().alias("days"),
        )
        .sort(keys)
    )
    counts, person_years, rates = [], [], []
    for r in cells.iter_rows(named=True):
        sex, year = r.get("sex"), r.get("calendar_year")
        band = parse_age_band(r["age_band"])
        found = table.rate(outcome, sex, None if year is None else int(year), band)
        if found is None:
            stratum = (outcome, sex, None if year is None else int(year))
            raise AscertainError(
                f"the reference rates {table.file.name} have no rate for the age band "
                f"{r['age_band']} ({stratum_label(stratum)}) of the cohort"
            )
        counts.append(int(r["events"]))
        person_years.append(r["days"] / DAYS_PER_YEAR)
        rates.append(found.rate)
    return counts, person_years, rates


def _rounded(value: float, digits: int = 2) -> float | None:
    return round(value, digits) if math.isfinite(value) else None


def smr_summary(
    persontime: pl.DataFrame,
    cohort: pl.DataFrame,
    table: ReferenceRates,
    block: Block,
    hidden: frozenset[str],
    threshold: int,
) -> pl.DataFrame:
    """Each outcome's observed and expected events and SMR as published (``summary/smr.csv``).

    Args:
        persontime: The build's person-time table.
        cohort: The analysis table.
        table: The reference rates.
        block: The rates block (its total rows give each outcome's observed count and key).
        hidden: The hidden keys of the report's suppression.
        threshold: The small-cell threshold.
    """
    totals = block.frame.filter((pl.col("age_band") == _ALL) & (pl.col("calendar_year") == _ALL))
    if SINCE_COLUMN in totals.columns:
        totals = totals.filter(pl.col(SINCE_COLUMN) == _ALL)
    rows: list[dict[str, Any]] = []
    for r in totals.iter_rows(named=True):
        o, key = r["outcome"], r["events#key"]
        row: dict[str, Any] = {"outcome": o, "reference": table.name}
        row |= {"observed": shown(r["events"], key, hidden, threshold), "expected": None}
        row |= {"smr": None, "smr_low": None, "smr_high": None, "note": None}
        if o not in table.outcomes:
            rows.append(row | {"note": "no reference rates for this outcome in the table"})
            continue
        events, person_years, rates = expected_cells(persontime, cohort, table, o)
        if sum(events) != r["events"]:  # the same cells as the rates table, so never
            raise AscertainError(f"the observed events of {o} differ from the rates table")
        ratio = standardised_ratio(events, person_years, rates, reference_per=1000.0)
        row["expected"] = _rounded(ratio.expected)
        if key in hidden:
            rows.append(row | {"note": "left out: the observed count is suppressed"})
            continue
        if ratio.expected == 0:
            rows.append(row | {"note": "not estimable: no events are expected"})
            continue
        rows.append(
            row
            | {
                "smr": _rounded(ratio.ratio),
                "smr_low": _rounded(ratio.low),
                "smr_high": _rounded(ratio.high),
            }
        )
    schema = {
        "outcome": pl.String,
        "reference": pl.String,
        "observed": pl.String,
        "expected": pl.Float64,
        "smr": pl.Float64,
        "smr_low": pl.Float64,
        "smr_high": pl.Float64,
        "note": pl.String,
    }
    return pl.DataFrame(rows, schema=schema, orient="row")


def changed_reference(manifest: dict[str, Any], loaded: LoadedStudy) -> list[str]:
    """A note when the reference rate table differs from the one the build recorded.

    The SMRs are computed when the report is written, from the table as it is then; a table
    edited since the build gives other expected counts than the build's manifest vouches for.
    """
    table = loaded.reference_rates
    if table is None:
        return []
    recorded = {e["sha256"] for e in manifest.get("reference_rates", [])}
    if not recorded:
        return [f"The reference rate table {table.file.name} was not read by the build."]
    if sha256_file(table.file) not in recorded:
        return [f"The reference rate table {table.file.name} has changed since the build."]
    return []
