"""The report's rates from person-time: events and person-years by age band and calendar year.

Read from ``persontime.parquet`` when the build wrote one (the report leaves the section out
otherwise). Per outcome ``X`` the cells of the person-time table are summed by age band and
calendar year (``days_at_risk_X``, ``events_X``; null where the patient was not at risk), and
by age band over all years; rates are per 1,000 person-years (days / 365.25) with the exact
Poisson interval, and the age bands' rates are standardised to each shipped standard
population (:mod:`pipeline.stats._standards`) with the Fay-Feuer interval.

Suppression: every event count is a cell of the report's one system (:class:`Block`). The
years of a band add up to the band, and the bands to the outcome's total; when that total is
the number of incident cases the incidence table shows (it is whenever person-time ends at
onset, as it should), it shares that table's key ``events|X``, so a hidden band cannot be
worked out from the incidence table either. A rate from a hidden count is left out, and a
standardised rate is left out when any band count it uses is hidden. Person-years are shown
as they are: they are not counts of patients.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import polars as pl

from pipeline.compile import names
from pipeline.errors import AscertainError
from pipeline.outputs.report._rates_since import SINCE, SINCE_COLUMN, since_index_rows
from pipeline.outputs.report._suppression import Block, keyed_frame
from pipeline.stats import (
    DAYS_PER_YEAR,
    direct_standardised_rate,
    parse_age_band,
    poisson_exact_interval,
    shipped_standard,
    weights_for_bands,
)
from pipeline.stats._disclosure import shown

__all__ = [
    "PERSONTIME",
    "RATE_STANDARDS",
    "rates_block",
    "rates_summary",
    "read_persontime",
    "standard_sources",
    "standardised_summary",
]

PERSONTIME = "persontime.parquet"
RATE_STANDARDS = ("esp2013", "who2000_2025")
"""The standard populations every report standardises to (both shipped with the package)."""

ALL = "all"
_PER = 1000.0


def read_persontime(output_dir: Path) -> pl.DataFrame | None:
    """The build's person-time table, or None when the build wrote none.

    Raises:
        AscertainError: The file is there but cannot be read.
    """
    path = Path(output_dir) / PERSONTIME
    if not path.is_file():
        return None
    try:
        return pl.read_parquet(path)
    except (OSError, pl.exceptions.PolarsError) as err:
        raise AscertainError(f"{path.name}: cannot read the person-time table: {err}") from err


def _outcome_cells(persontime: pl.DataFrame, outcome: str, *, by_year: bool) -> pl.DataFrame:
    """Events and person-years of one outcome by band (and year), plus each band over years."""
    days, events = names.persontime_columns(outcome)
    missing = [c for c in (days, events, "age_band", "age_band_start") if c not in persontime]
    if missing:
        raise AscertainError(f"{PERSONTIME} has no column {', '.join(missing)}")
    at_risk = persontime.filter(pl.col(days).is_not_null())
    sums = (
        pl.col(events).cast(pl.Int64).sum().alias("events"),
        (pl.col(days).cast(pl.Float64).sum() / DAYS_PER_YEAR).alias("person_years"),
    )
    band = ["age_band_start", "age_band"]
    parts = [at_risk.group_by(band).agg(*sums).with_columns(calendar_year=pl.lit(ALL))]
    if by_year:
        year = pl.col("calendar_year").cast(pl.String)
        parts.append(at_risk.group_by(*band, year).agg(*sums))
    columns = [*band, "calendar_year", "events", "person_years"]
    return pl.concat([p.select(columns) for p in parts]).sort(
        "age_band_start", pl.col("calendar_year") == ALL, "calendar_year"
    )


def rates_block(
    persontime: pl.DataFrame, outcomes: Sequence[str], incident: dict[str, int]
) -> Block:
    """Event counts of every outcome by band and year as one block of the suppression system.

    Args:
        persontime: The build's person-time table.
        outcomes: The study's outcomes.
        incident: Each outcome's incident cases among those at risk (the incidence table's
            events), so that equal totals share its key.

    Returns:
        The block: one row per outcome, band and year (``all`` for a band over its years, and
        a last row ``all``/``all`` for the outcome), with ``events#key``.
    """
    by_year = "calendar_year" in persontime.columns
    rows: list[dict[str, Any]] = []
    relations = []
    for o in outcomes:
        cells = _outcome_cells(persontime, o, by_year=by_year)
        bands = cells.filter(pl.col("calendar_year") == ALL)
        total = int(bands["events"].sum())
        total_key = f"events|{o}" if incident.get(o) == total else f"pt|{o}|{ALL}|{ALL}"
        band_keys = []
        for r in cells.iter_rows(named=True):
            key = f"pt|{o}|{r['age_band']}|{r['calendar_year']}"
            rows.append(r | {"outcome": o, "events#key": key})
            if r["calendar_year"] == ALL:
                band_keys.append(key)
                years = [
                    f"pt|{o}|{r['age_band']}|{y}"
                    for y in cells.filter(
                        (pl.col("age_band") == r["age_band"]) & (pl.col("calendar_year") != ALL)
                    )["calendar_year"]
                ]
                if years:
                    relations.append(((key, -1), *((k, 1) for k in years)))
        relations.append(((total_key, -1), *((k, 1) for k in band_keys)))
        rows.append(
            {
                "outcome": o,
                "age_band_start": -1,
                "age_band": ALL,
                "calendar_year": ALL,
                "events": total,
                "person_years": float(bands["person_years"].sum()),
                "events#key": total_key,
            }
        )
        since, relation = since_index_rows(persontime, o, total_key)
        rows += since
        relations += [relation] if relation else []
    schema = {
        "outcome": pl.String,
        "age_band_start": pl.Int64,
        "age_band": pl.String,
        "calendar_year": pl.String,
        "events": pl.Int64,
        "person_years": pl.Float64,
        "events#key": pl.String,
    }
    if SINCE in persontime.columns:  # the since-index bands, "all" on the other rows
        rows = [{SINCE_COLUMN: ALL} | r for r in rows]
        schema = {SINCE_COLUMN: pl.String} | schema
    frame = keyed_frame(rows, schema)
    return Block(frame, ("events",), relations=tuple(relations))


def standard_sources() -> list[tuple[str, str, str]]:
    """Each standard population the report uses: its name, source and how its figures were got."""
    out = []
    for name in RATE_STANDARDS:
        standard = shipped_standard(name)
        figures = standard.figures + (f"; {standard.note}" if standard.note else "")
        out.append((standard.name, standard.source, figures))
    return out


def _rate(events: int, person_years: float) -> tuple[float, float, float] | None:
    if person_years <= 0:
        return None
    ci = poisson_exact_interval(events, person_years)
    return ci.estimate * _PER, ci.low * _PER, ci.high * _PER


def _rounded(value: float | None) -> float | None:
    return None if value is None or math.isnan(value) else round(value, 2)


def rates_summary(block: Block, hidden: frozenset[str], threshold: int) -> pl.DataFrame:
    """The rates table as published: hidden counts marked, their rates left out."""
    rows = []
    since = SINCE_COLUMN in block.frame.columns  # the study split by time since index
    for r in block.frame.iter_rows(named=True):
        gone = r["events#key"] in hidden
        rate = None if gone else _rate(r["events"], r["person_years"])
        rows.append(
            {
                "outcome": r["outcome"],
                "age_band": r["age_band"],
                "calendar_year": r["calendar_year"],
                **({SINCE_COLUMN: r[SINCE_COLUMN]} if since else {}),
                "events": shown(r["events"], r["events#key"], hidden, threshold),
                "person_years": round(r["person_years"], 1),
                "rate_per_1000_py": _rounded(rate[0]) if rate else None,
                "rate_low": _rounded(rate[1]) if rate else None,
                "rate_high": _rounded(rate[2]) if rate else None,
            }
        )
    schema = {
        "outcome": pl.String,
        "age_band": pl.String,
        "calendar_year": pl.String,
        **({SINCE_COLUMN: pl.String} if since else {}),
        "events": pl.String,
        "person_years": pl.Float64,
        "rate_per_1000_py": pl.Float64,
        "rate_low": pl.Float64,
        "rate_high": pl.Float64,
    }
    return pl.DataFrame(rows, schema=schema, orient="row")


def standardised_summary(block: Block, hidden: frozenset[str]) -> pl.DataFrame:
    """Each outcome's rate standardised to each shipped standard, or why it is not shown.

    The bands used are the person-time table's age bands over all years; a standard band
    outside them carries no weight (the rate is standardised over the study's ages).
    """
    rows = []
    bands = block.frame.filter((pl.col("calendar_year") == ALL) & (pl.col("age_band") != ALL))
    if SINCE_COLUMN in bands.columns:
        bands = bands.filter(pl.col(SINCE_COLUMN) == ALL)
    for name in RATE_STANDARDS:
        standard = shipped_standard(name)
        for o in dict.fromkeys(block.frame["outcome"].to_list()):
            part = bands.filter(pl.col("outcome") == o)
            row: dict[str, Any] = {"outcome": o, "standard": standard.name}
            row |= {"rate_per_1000_py": None, "rate_low": None, "rate_high": None, "note": ""}
            try:
                weights = weights_for_bands(standard, [parse_age_band(b) for b in part["age_band"]])
            except (AscertainError, ValueError) as err:
                rows.append(row | {"note": f"not standardised: {err}"})
                continue
            if any(k in hidden for k in part["events#key"]):
                rows.append(row | {"note": "left out: a band's count is suppressed"})
                continue
            if (part["person_years"] <= 0).any():
                rows.append(row | {"note": "not estimable: a band has no person-time"})
                continue
            dsr = direct_standardised_rate(
                part["events"].to_list(), part["person_years"].to_list(), weights, per=_PER
            )
            rows.append(
                row
                | {
                    "rate_per_1000_py": _rounded(dsr.estimate),
                    "rate_low": _rounded(dsr.low),
                    "rate_high": _rounded(dsr.high),
                    "note": f"ages {', '.join(part['age_band'])}",
                }
            )
    schema = {
        "outcome": pl.String,
        "standard": pl.String,
        "rate_per_1000_py": pl.Float64,
        "rate_low": pl.Float64,
        "rate_high": pl.Float64,
        "note": pl.String,
    }
    return pl.DataFrame(rows, schema=schema, orient="row")
