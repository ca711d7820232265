"""``ascertain profile``'s DuckDB half: what is in a new extract and what is wrong with it.

One DuckDB pass per question over the same source views a build uses: row counts, date ranges
and rows per year, unreadable dates, orphan rows, code systems and the most frequent codes,
measures with their units and value percentiles (never minimum or maximum).
"""

from __future__ import annotations

import tempfile
from pathlib import Path
from typing import Any

import duckdb
from sqlglot import exp

from pipeline.compile import unreadable_patient_date
from pipeline.engine.duckdb import DuckDBEngine, read_failure
from pipeline.errors import EngineError
from pipeline.extract import ExtractTable
from pipeline.extract.schema import POSITION_BASE, SourceTable, canonical_table

TOP = 10


def _fetch(con: duckdb.DuckDBPyConnection, query: exp.Query) -> list[dict[str, Any]]:
    result = con.execute(query.sql("duckdb"))
    names = [d[0] for d in result.description or []]
    return [dict(zip(names, row, strict=True)) for row in result.fetchall()]


def _date(column: str) -> exp.Expression:
    return exp.TryCast(this=exp.column(column), to=exp.DataType.build("DATE"))


def _where(position: int | None, table: ExtractTable) -> str | None:
    """A source position as ``file:row`` (CSV: row after the header; NDJSON: the line)."""
    if position is None:
        return None
    return f"{table.files[position // POSITION_BASE].name}:{position % POSITION_BASE}"


def _table_profile(
    con: duckdb.DuckDBPyConnection, name: str, table: ExtractTable
) -> dict[str, Any]:
    relation = f"src_{name}"
    # The date that places a row in time, as the schema says (a patient's birth).
    row_date = canonical_table(name).row_date
    day = _date(row_date)
    given = exp.func(
        "NULLIF",
        exp.Trim(this=exp.cast(exp.column(row_date), "VARCHAR")),
        exp.Literal.string(""),
    )
    problem = exp.column("source_problem")
    summary = exp.select(
        exp.func("COUNT", exp.Star()).as_("rows"),
        exp.Min(this=day).as_("first_date"),
        exp.Max(this=day.copy()).as_("last_date"),
        exp.func(
            "COUNT_IF", exp.and_(given.copy().is_(exp.null()).not_(), day.copy().is_(exp.null()))
        ).as_("unreadable_dates"),
        # As the build counts them: not rows the reader set aside for another reason first.
        exp.func(
            "COUNT_IF",
            exp.and_(
                given.copy().is_(exp.null()),
                exp.or_(problem.copy().is_(exp.null()), problem.copy().eq("missing date")),
            ),
        ).as_("missing_dates"),
        # A FHIR resource whose subject is no Patient; an empty id in CSV is an orphan, as in
        # the build.
        exp.func("COUNT_IF", problem.copy().eq("no patient reference")).as_("rows_without_patient"),
    ).from_(relation)
    profile: dict[str, Any] = _fetch(con, summary)[0]
    per_year = (
        exp.select(exp.Year(this=day.copy()).as_("year"), exp.func("COUNT", exp.Star()).as_("rows"))
        .from_(relation)
        .where(day.copy().is_(exp.null()).not_())
        .group_by("year")
        .order_by("year")
    )
    profile["rows_per_year"] = {str(r["year"]): r["rows"] for r in _fetch(con, per_year)}
    set_aside = (
        exp.select(
            problem.copy().as_("reason"),
            exp.func("COUNT", exp.Star()).as_("rows"),
            exp.func("MIN", exp.column("source_position")).as_("first"),
        )
        .from_(relation)
        .where(problem.copy().is_(exp.null()).not_())
        .group_by(problem.copy())
        .order_by(problem.copy())
    )
    profile["set_aside_by_reader"] = {
        r["reason"]: {"rows": r["rows"], "first": _where(r["first"], table)}
        for r in _fetch(con, set_aside)
    }
    if name == "patients":
        profile.pop("rows_without_patient")
        profile["duplicate_patient_ids"] = _duplicate_ids(con, table)
    else:
        profile["orphan_rows"] = _fetch(con, _orphans(relation))[0]["n"]
    return profile


def _duplicate_ids(con: duckdb.DuckDBPyConnection, table: ExtractTable) -> list[dict[str, Any]]:
    """Patient ids given on more than one row (the first five), with where each row is.

    The build counts identical rows once (exact duplicates) and stops on rows that differ;
    either way the analyst wants to find them before a study.
    """
    query = (
        exp.select(
            exp.column("patient_id"),
            exp.func("COUNT", exp.Star()).as_("rows"),
            exp.func("LIST", exp.column("source_position")).as_("positions"),
        )
        .from_("src_patients")
        .where(
            exp.and_(
                exp.column("patient_id").is_(exp.null()).not_(),
                exp.column("source_problem").is_(exp.null()),
            )
        )
        .group_by(exp.column("patient_id"))
        .having(exp.func("COUNT", exp.Star()) > exp.Literal.number(1))
        .order_by(exp.column("patient_id"))
        .limit(5)
    )
    found = []
    for row in _fetch(con, query):
        positions = sorted(p for p in row["positions"] if p is not None)
        where = [w for w in (_where(p, table) for p in positions) if w]
        found.append({"patient_id": str(row["patient_id"]), "rows": row["rows"], "where": where})
    return found


def _orphans(relation: str) -> exp.Query:
    """Rows of an event table whose patient is not in patients, counted as the build does.

    The build's quality log joins each row to the patients (``LEFT JOIN patient_base``) and
    calls it an orphan when no patient matches: also when its patient_id is empty or cannot
    be read as the patients table's id type (the views bind every patient_id with TRY_CAST to
    that type, so such an id is NULL). ``NOT IN`` would miss exactly those rows, since
    ``NULL NOT IN (...)`` is not true: an extract whose ids differ in type between tables
    showed no orphans while the build set every row aside. A patient the build leaves out for
    an unreadable date leaves orphans too.
    """
    patients = (
        exp.select("patient_id")
        .distinct()
        .from_("src_patients")
        .where(
            exp.and_(
                exp.column("patient_id").is_(exp.null()).not_(),
                exp.column("source_problem").is_(exp.null()),
                exp.not_(unreadable_patient_date()),
            )
        )
    )
    return (
        exp.select(exp.func("COUNT", exp.Star()).as_("n"))
        .from_(exp.to_table(relation).as_("r"))
        .join(
            patients.subquery("p"),
            on=exp.column("patient_id", "p").eq(exp.column("patient_id", "r")),
            join_type="LEFT",
        )
        .where(
            exp.and_(
                exp.column("patient_id", "p").is_(exp.null()),
                exp.column("source_problem", "r").is_(exp.null()),
            )
        )
    )


def _top_codes(
    con: duckdb.DuckDBPyConnection, relation: str, system: exp.Expression, code: str
) -> list[dict[str, Any]]:
    normalised = exp.func(
        "REPLACE",
        exp.func(
            "REPLACE",
            exp.Upper(this=exp.column(code)),
            exp.Literal.string("."),
            exp.Literal.string(""),
        ),
        exp.Literal.string(" "),
        exp.Literal.string(""),
    )
    ranked = (
        exp.select(
            system.as_("code_system"),
            normalised.as_("code"),
            exp.func("COUNT", exp.Star()).as_("rows"),
        )
        .from_(relation)
        .group_by(system.copy(), normalised.copy())  # a bare name would mean the raw column
    )
    numbered = exp.select(
        "code_system",
        "code",
        "rows",
        exp.Window(
            this=exp.func("ROW_NUMBER"),
            partition_by=[exp.column("code_system")],
            order=exp.Order(
                expressions=[
                    exp.Ordered(this=exp.column("rows"), desc=True),
                    exp.Ordered(this=exp.column("code")),
                ]
            ),
        ).as_("rank"),
    ).from_(ranked.subquery("c"))
    top = (
        exp.select("code_system", "code", "rows")
        .from_(numbered.subquery("n"))
        .where(exp.column("rank") <= TOP)
        .order_by("code_system", exp.Ordered(this=exp.column("rows"), desc=True), "code")
    )
    return _fetch(con, top)


PERCENTILES = (5, 25, 50, 75, 95)
"""Percentiles of each measure's values in the profile; no minimum or maximum, which are single
patients' values."""


def _measures(con: duckdb.DuckDBPyConnection, threshold: int) -> list[dict[str, Any]]:
    """Rows and value percentiles per measure and unit as written in the extract.

    Percentiles are given only for a (measure, unit) with at least ``threshold`` numeric
    values: a percentile of a few values is close to one patient's value. The minimum and
    maximum are never given; implausible values are counted by the build's quality log.
    """
    value = exp.TryCast(this=exp.column("value"), to=exp.DataType.build("DOUBLE"))
    measure = exp.Lower(this=exp.Trim(this=exp.cast(exp.column("measure"), "VARCHAR")))
    unit = exp.Trim(this=exp.cast(exp.column("unit"), "VARCHAR"))
    enough = exp.func("COUNT", value.copy()) >= exp.Literal.number(threshold)
    quantiles = [
        exp.case()
        .when(enough.copy(), exp.func("QUANTILE_CONT", value.copy(), exp.Literal.number(p / 100)))
        .as_(f"p{p}")
        for p in PERCENTILES
    ]
    query = (
        exp.select(
            measure.as_("measure"),
            unit.as_("unit"),
            exp.func("COUNT", exp.Star()).as_("rows"),
            exp.func("COUNT", value.copy()).as_("numeric"),
            *quantiles,
        )
        .from_("src_measurements")
        .group_by(measure.copy(), unit.copy())  # a bare name would mean the raw column
        .order_by(exp.column("measure"), exp.column("unit"))
    )
    return _fetch(con, query)


def profile_tables(
    engine: DuckDBEngine,
    sources: tuple[SourceTable, ...],
    tables: dict[str, ExtractTable],
    *,
    threshold: int = 5,
) -> dict[str, Any]:
    """Profile every table found; see the module docstring for what is measured.

    ``threshold`` is the smallest number of numeric values whose percentiles are given.

    Raises:
        ExtractError: A file cannot be read (named with its line), as in a build.
        EngineError: DuckDB failed otherwise.
    """
    with tempfile.TemporaryDirectory(prefix="ascertain-profile-") as scratch:
        con = engine._connect(Path(scratch))
        try:
            return _profile(con, engine, sources, tables, threshold)
        except duckdb.Error as err:
            raise read_failure(err) or EngineError(
                f"DuckDB failed: {err}", code="engine-failed"
            ) from err
        finally:
            con.close()


def _profile(
    con: duckdb.DuckDBPyConnection,
    engine: DuckDBEngine,
    sources: tuple[SourceTable, ...],
    tables: dict[str, ExtractTable],
    threshold: int,
) -> dict[str, Any]:
    engine._bind(con, sources, tables)
    result: dict[str, Any] = {
        "tables": {s.name: _table_profile(con, s.name, tables[s.name]) for s in sources}
    }
    if "diagnoses" in tables:
        system = exp.Upper(this=exp.Trim(this=exp.cast(exp.column("code_system"), "VARCHAR")))
        result["diagnosis_codes"] = _top_codes(con, "src_diagnoses", system, "code")
    if "prescriptions" in tables:
        result["prescription_codes"] = _top_codes(
            con, "src_prescriptions", exp.Literal.string("ATC"), "atc"
        )
    if "measurements" in tables:
        result["measures"] = _measures(con, threshold)
    return result
