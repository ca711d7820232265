"""The quality log: every extract row is either used or counted under the reason it was not.

Each table is grouped on all its columns once, so exact duplicates are found (the first copy is
judged, the others are counted as duplicates); each distinct row then gets the first reason that
applies, in the order the reasons are listed below, or ``used``. A separate count of rows read
lets the build check that used + set aside = read for every table. Each reason also keeps the
position of the first row it set aside (CSV only; see SOURCE_POSITION), so a user can find it.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.compile._context import CompileContext
from pipeline.compile._plan import SourceTable, Stage
from pipeline.compile._sources import (
    coded_tables,
    grouped_rows,
    raw_code_columns,
    same_raw_code,
    source_tables,
)
from pipeline.compile._sql import query, value

_DATED = """
SELECT
  CASE
    WHEN p.patient_id IS NULL THEN 'orphan patient'
    WHEN r.row_date IS NULL THEN 'unparseable date'
    WHEN :problem IS NOT NULL THEN :problem
    WHEN r.row_date > :end_of_data THEN 'after end of data'
    WHEN p.death_date IS NOT NULL AND r.row_date > p.death_date THEN 'after death'
    ELSE 'used'
  END AS reason,
  r.copies,
  r.source_position
FROM :rows
LEFT JOIN patient_base AS p ON p.patient_id = r.patient_id
"""

# Every measurement row was judged in measurement_judged.
_MEASUREMENTS = """
SELECT COALESCE(problem, 'used') AS reason, copies, source_position
FROM measurement_judged
"""

_PATIENTS = """
SELECT
  CASE WHEN patient_id IS NULL THEN 'missing patient_id' ELSE 'used' END AS reason,
  copies,
  source_position
FROM :rows
"""

_SUMMARY = """
SELECT
  reason,
  :table_name AS source_table,
  COUNT(*) AS distinct_rows,
  SUM(copies - 1) AS duplicates,
  MIN(CASE WHEN reason <> 'used' THEN source_position END) AS first_position
FROM :classified
GROUP BY reason
"""

_LOG = """
SELECT
  source_table,
  CASE WHEN reason = 'used' THEN 'used' ELSE 'set aside' END AS outcome,
  CASE WHEN reason = 'used' THEN :used ELSE reason END AS reason,
  CAST(SUM(n) AS BIGINT) AS n_rows,
  MIN(first_position) AS first_position
FROM (
  SELECT source_table, reason, distinct_rows AS n, first_position FROM summary
  UNION ALL
  SELECT source_table, 'exact duplicate' AS reason, duplicates AS n,
    CAST(NULL AS BIGINT) AS first_position
  FROM summary
  WHERE duplicates > 0
) AS counted
GROUP BY source_table, reason
"""


_DATE_COLUMNS = {
    "encounters": "encounter_date",
    "diagnoses": "event_date",
    "prescriptions": "start_date",
}


def _classified(ctx: CompileContext, table: SourceTable) -> exp.Query:
    check = ctx.study.quality.exact_duplicates == "check"
    grouped = grouped_rows(table, check_duplicates=check).subquery("g")
    if table.name == "patients":
        return query(_PATIENTS, rows=grouped)
    if table.name == "measurements":
        return query(_MEASUREMENTS)
    dated = exp.select(
        exp.Star(),
        exp.TryCast(this=exp.column(_DATE_COLUMNS[table.name]), to=exp.DataType.build("DATE")).as_(
            "row_date"
        ),
    ).from_(grouped)
    if table.name == "encounters":
        return query(
            _DATED, rows=dated.subquery("r"), problem=exp.null(), end_of_data=ctx.study.end_of_data
        )
    # Codes were judged once per distinct value, in extract_codes.
    dated = dated.select(*(c.as_(n) for n, c in raw_code_columns(table.name).items()))
    dated = dated.select(value(table.name).as_("source_table"))
    judged = query(
        _DATED,
        rows=dated.subquery("r"),
        problem=exp.column("problem", "c"),
        end_of_data=ctx.study.end_of_data,
    )
    codes = exp.to_table("extract_codes").as_("c")
    return judged.join(codes, on=same_raw_code("r", "c"), join_type="LEFT")


def quality_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """``rows_read``, and ``quality_log``: rows per table, outcome and reason."""
    tables = source_tables(ctx)
    read = [
        exp.select(
            value(t.name).as_("source_table"),
            exp.cast(exp.func("COUNT", exp.Star()), "BIGINT").as_("n_rows"),
        ).from_(t.relation)
        for t in tables
    ]
    checked = ctx.study.quality.exact_duplicates == "check"
    used = "used" if checked else "used (exact duplicates not checked)"
    summaries = [
        query(_SUMMARY, table_name=t.name, classified=_classified(ctx, t).subquery("c"))
        for t in tables
    ]
    depends = {t.relation for t in tables if t.name != "measurements"} | {"patient_base"}
    if coded_tables(ctx):
        depends.add("extract_codes")
    if any(t.name == "measurements" for t in tables):
        depends.add("measurement_judged")
    return (
        Stage(
            "rows_read",
            _union(read),
            tuple(sorted(t.relation for t in tables)),
            "rows read per extract table, counted on their own to check the quality log",
        ),
        Stage(
            "quality_log",
            query(_LOG, used=used).with_("summary", as_=_union(summaries)),
            tuple(sorted(depends)),
            "every extract row: used, or set aside with the first reason that applies",
        ),
    )


def _union(parts: list[exp.Query]) -> exp.Query:
    union = parts[0]
    for part in parts[1:]:
        union = union.union(part, distinct=False)
    return union
