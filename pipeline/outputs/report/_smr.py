"""The report's observed and expected events and SMRs against the study's reference rates.

Only when the study names a reference rate table (``persontime: reference_rates:``, read by
:mod:`pipeline.config._reference_rates`) and the build wrote ``persontime.parquet``. For each
outcome the table names, the cohort's days at risk are summed by the study's age band, by sex
(from ``cohort.parquet``) and, when the table is by year, by calendar year; each cell's
person-years times the table's rate for the band holding it (for the cell's sex and year when
the table is by them) gives its expected events. The SMR is given for the whole outcome, for
each age band and for each sex, each with :func:`pipeline.stats.standardised_ratio` (the
expected count fixed, the observed one Poisson, exact limits).

Suppression: the observed counts are cells of the report's one linked system. The outcome's
count is the rates table's total row and each band's the rates table's band row (the same keys,
so the same cells). The counts by sex are new cells: they add up to the outcome's total (the
incidence table's incident cases), and each counts the incident cases of one sex, as Table 1's
"incident" column does on its sex row, so it is described by those patients (:mod:`._cells`)
and shares that cell's key. Where an observed count is hidden its SMR and interval are left
out, since the SMR times the expected count gives it back; the expected count is shown
(person-time times rates, not a count of patients).
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
from pipeline.outputs.report._cells import Spec
from pipeline.outputs.report._rates_since import SINCE_COLUMN
from pipeline.outputs.report._suppression import Block, keyed_frame, shown
from pipeline.stats import DAYS_PER_YEAR, baseline_variables, parse_age_band, standardised_ratio

__all__ = ["changed_reference", "expected_cells", "expected_frame", "smr_block", "smr_summary"]

_ALL = "all"
_MISSING = "missing"
"""The sex of a patient whose sex is not recorded, as Table 1 labels it."""


def _sex_label() -> pl.Expr:
    return pl.col("sex").cast(pl.String).fill_null(_MISSING)


def expected_frame(
    persontime: pl.DataFrame, cohort: pl.DataFrame, table: ReferenceRates, outcome: str
) -> pl.DataFrame:
    """One outcome's events, person-years and reference rate per cell of band, sex and year.

    Args:
        persontime: The build's person-time table.
        cohort: The analysis table (each patient's sex).
        table: The reference rates.
        outcome: The outcome.

    Returns:
        Columns ``age_band_start``, ``age_band``, ``sex`` (``missing`` where not recorded),
        ``calendar_year`` (only when the table is by year), ``events``, ``person_years``,
        ``rate`` (per 1,000 person-years) and ``expected``; sorted by the keys.

    Raises:
        AscertainError: A cell has no rate in the table, naming its band and stratum (the
            study's load checks this, so it means the table changed since then).
    """
    days, events = names.persontime_columns(outcome)
    frame = persontime.filter(pl.col(days).is_not_null())
    frame = frame.join(cohort.select("patient_id", "sex"), on="patient_id", how="left")
    keys = ["age_band_start", "age_band", "sex"]
    if table.by_year:
        if "calendar_year" not in frame.columns:
            raise AscertainError(
                f"the reference rates {table.file.name} are by calendar year but the "
                "person-time table is not split by year"
            )
        keys.append("calendar_year")
    cells = (
        frame.with_columns(_sex_label().alias("sex"))
        .group_by(keys)
        .agg(
            pl.col(events).cast(pl.Int64).sum().alias("events"),
            pl.col(days).cast(pl.Int64).sum().alias("days"),
        )
        .sort(keys)
    )
    rates = []
    for r in cells.iter_rows(named=True):
        year = r.get("calendar_year")
        sex = None if r["sex"] == _MISSING else r["sex"]
        found = table.rate(
            outcome, sex, None if year is None else int(year), parse_age_band(r["age_band"])
        )
        if found is None:
            stratum = (outcome, sex if table.by_sex else None, None if year is None else int(year))
            raise AscertainError(
                f"the reference rates {table.file.name} have no rate for the age band "
                f"{r['age_band']} ({stratum_label(stratum)}) of the cohort"
            )
        rates.append(found.rate)
    person_years = pl.col("days") / DAYS_PER_YEAR
    return (
        cells.with_columns(person_years.alias("person_years"), pl.Series("rate", rates, pl.Float64))
        .with_columns((pl.col("person_years") * pl.col("rate") / 1000.0).alias("expected"))
        .drop("days")
    )


def expected_cells(
    persontime: pl.DataFrame, cohort: pl.DataFrame, table: ReferenceRates, outcome: str
) -> tuple[list[int], list[float], list[float]]:
    """Events, person-years and rate per cell of :func:`expected_frame`, as lists."""
    frame = expected_frame(persontime, cohort, table, outcome)
    return frame["events"].to_list(), frame["person_years"].to_list(), frame["rate"].to_list()


def _events_of_sex(outcome: str, sex: str) -> Spec:
    """Whom an outcome's events of one sex count (as Table 1's incident column, sex row)."""
    return ((f"at|{outcome}", "true"), (f"inc|{outcome}", "true"), ("sex", sex))


def _cohort_events_of_sex(cohort: pl.DataFrame, outcome: str) -> dict[str, int]:
    incident = pl.col(names.outcome_columns(outcome).incident).fill_null(value=False)
    counted = cohort.filter(incident).group_by(_sex_label().alias("sex")).len()
    return {str(s): int(n) for s, n in counted.iter_rows()}


def _row(outcome: str, band: str, sex: str, key: str, cells: pl.DataFrame) -> dict[str, Any]:
    return {
        "outcome": outcome,
        "age_band": band,
        "sex": sex,
        "events": int(cells["events"].sum()),
        "events#key": key,
        "person_years": cells["person_years"].to_list(),
        "rates": cells["rate"].to_list(),
        "cell_events": cells["events"].to_list(),
    }


def smr_block(
    persontime: pl.DataFrame, cohort: pl.DataFrame, table: ReferenceRates, rates: Block
) -> Block:
    """Observed events of each outcome, age band and sex as one block of the suppression system.

    Args:
        persontime: The build's person-time table.
        cohort: The analysis table.
        table: The reference rates.
        rates: The rates block (:func:`pipeline.outputs.report._rates.rates_block`): its total
            and band rows give the outcome's and each band's count and key.

    Returns:
        One row per outcome (``all``/``all``), age band (band/``all``) and sex (``all``/sex),
        with ``events``, ``events#key`` and each row's cells (person-years, rates, events) for
        its expected count; an outcome the table does not name has its total row only.

    Raises:
        AscertainError: A count differs from the rates table's or from the cohort's incident
            cases of a sex (the person-time accounting check makes both impossible).
    """
    frame = rates.frame.filter(pl.col("calendar_year") == _ALL)
    if SINCE_COLUMN in frame.columns:
        frame = frame.filter(pl.col(SINCE_COLUMN) == _ALL)
    keys = {(r["outcome"], r["age_band"]): r for r in frame.iter_rows(named=True)}
    described = "sex" in baseline_variables(cohort)
    rows: list[dict[str, Any]] = []
    relations = []
    meanings: dict[str, Spec] = {}
    empty = pl.DataFrame(
        schema={"events": pl.Int64, "person_years": pl.Float64, "rate": pl.Float64}
    )
    for o in dict.fromkeys(frame["outcome"].to_list()):
        total = keys[(o, _ALL)]
        if o not in table.outcomes:
            rows.append(
                _row(o, _ALL, _ALL, total["events#key"], empty) | {"events": total["events"]}
            )
            continue
        cells = expected_frame(persontime, cohort, table, o)
        parts = [(_ALL, _ALL, total, cells)]
        parts += [
            (band, _ALL, keys[(o, band)], cells.filter(pl.col("age_band") == band))
            for band in dict.fromkeys(cells["age_band"].to_list())
        ]
        for band, sex, known, part in parts:
            if int(part["events"].sum()) != known["events"]:  # the same cells, so never
                raise AscertainError(
                    f"the observed events of {o} ({band}) differ from the rates table"
                )
            rows.append(_row(o, band, sex, known["events#key"], part))
        cohort_counts = _cohort_events_of_sex(cohort, o)
        sex_keys = []
        for sex in sorted(set(cells["sex"].to_list())):
            key = f"pt|{o}|sex|{sex}"
            row = _row(o, _ALL, sex, key, cells.filter(pl.col("sex") == sex))
            if row["events"] != cohort_counts.get(sex, 0):  # the accounting check, so never
                raise AscertainError(
                    f"the observed events of {o} (sex {sex}) differ from the cohort"
                )
            rows.append(row)
            sex_keys.append(key)
            if described:
                meanings[key] = _events_of_sex(o, sex)
        relations.append(((total["events#key"], -1), *((k, 1) for k in sex_keys)))
    schema = {
        "outcome": pl.String,
        "age_band": pl.String,
        "sex": pl.String,
        "events": pl.Int64,
        "events#key": pl.String,
        "person_years": pl.List(pl.Float64),
        "rates": pl.List(pl.Float64),
        "cell_events": pl.List(pl.Int64),
    }
    return Block(
        keyed_frame(rows, schema), ("events",), relations=tuple(relations), meanings=meanings
    )


def _rounded(value: float, digits: int = 2) -> float | None:
    return round(value, digits) if math.isfinite(value) else None


def smr_summary(
    block: Block, table: ReferenceRates, hidden: frozenset[str], threshold: int
) -> pl.DataFrame:
    """Observed and expected events and SMR as published (``summary/smr.csv``).

    One row per outcome (``age_band`` and ``sex`` ``all``), then per age band and per sex.

    Args:
        block: The SMR block (:func:`smr_block`).
        table: The reference rates.
        hidden: The hidden keys of the report's suppression.
        threshold: The small-cell threshold.
    """
    rows: list[dict[str, Any]] = []
    for r in block.frame.iter_rows(named=True):
        o, key = r["outcome"], r["events#key"]
        row: dict[str, Any] = {"outcome": o, "age_band": r["age_band"], "sex": r["sex"]}
        row |= {"reference": table.name, "observed": shown(r["events"], key, hidden, threshold)}
        row |= {"expected": None, "smr": None, "smr_low": None, "smr_high": None, "note": None}
        if o not in table.outcomes:
            rows.append(row | {"note": "no reference rates for this outcome in the table"})
            continue
        ratio = standardised_ratio(
            r["cell_events"], r["person_years"], r["rates"], reference_per=1000.0
        )
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
        "age_band": pl.String,
        "sex": pl.String,
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
