"""The stages of the code audit (``ascertain codes``): which extract codes each evidence matched.

The audit runs the study's own plan up to ``codes_to_evidence`` (so a code counts for a piece of
evidence exactly when the build would count it) and adds the stages below. Each coded extract
table is read once, in ``audit_used``: its usable rows, judged as the quality log judges them
(a row the quality log calls used is here, and no other), grouped by raw code, patient, year
and prescription length. Everything after reads that grouping and the small ``codes_to_evidence``.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._context import CompileContext
from pipeline.compile._judged import grouped_rows, same_raw_code
from pipeline.compile._plan import SOURCE_PROBLEM, Plan, Stage
from pipeline.compile._sources import (
    DIAGNOSES,
    PRESCRIPTIONS,
    coded_tables,
    raw_code_columns,
)
from pipeline.compile._sql import days_between, query

AUDIT_OUTPUTS = ("audit_code_counts", "audit_code_years", "audit_extract_codes", "audit_totals")
"""The audit plan's outputs, all small: one row per code (and year), or per table."""

# One row per group of usable rows: the conditions are the quality log's (_DATED in
# compile/_quality.py) in the same order, so used rows here are its used rows. With the
# duplicate check on, exact copies were grouped first and count once, as there.
_USED = """
SELECT
  r.source_table, r.raw_system, r.raw_code, r.raw_source, c.code_system, c.code,
  r.patient_id, CAST(EXTRACT(YEAR FROM r.row_date) AS INT) AS year, r.duration_days,
  CAST(COUNT(*) AS BIGINT) AS n_rows
FROM :rows
JOIN :base AS p ON p.patient_id = r.patient_id
JOIN :found_codes AS c ON :same_code
WHERE r.source_problem IS NULL
  AND r.row_date IS NOT NULL
  AND c.problem IS NULL
  AND r.row_date <= :end_of_data
  AND (p.death_date IS NULL OR r.row_date <= p.death_date)
GROUP BY
  r.source_table, r.raw_system, r.raw_code, r.raw_source, c.code_system, c.code,
  r.patient_id, CAST(EXTRACT(YEAR FROM r.row_date) AS INT), r.duration_days
"""

# The build's rule (compile/_evidence.py, _CODED_MATCHES and coded_evidence_days): a row counts for
# an evidence when its code is included and not excluded, and a prescription lasts long enough.
_MATCHED = """
SELECT
  m.evidence, u.source_table, u.raw_system, u.raw_code, u.raw_source, u.code_system, u.code,
  u.patient_id, u.year, u.duration_days, u.n_rows
FROM audit_used AS u
JOIN :matches AS m ON :same_code
WHERE m.included AND NOT m.excluded
  AND (m.min_days IS NULL OR u.duration_days >= m.min_days)
"""

_CODE_COUNTS = """
SELECT
  evidence, source_table, code_system, raw_code, code,
  CAST(SUM(n_rows) AS BIGINT) AS n_rows,
  CAST(COUNT(DISTINCT patient_id) AS BIGINT) AS patients,
  MIN(year) AS first_year,
  MAX(year) AS last_year
FROM audit_matched
GROUP BY evidence, source_table, code_system, raw_code, code
"""

_CODE_YEARS = """
SELECT
  evidence, source_table, code_system, raw_code, code, year,
  CAST(SUM(n_rows) AS BIGINT) AS n_rows,
  CAST(COUNT(DISTINCT patient_id) AS BIGINT) AS patients
FROM audit_matched
GROUP BY evidence, source_table, code_system, raw_code, code, year
"""

_EXTRACT_CODES = """
SELECT
  source_table, code_system, code,
  CAST(SUM(n_rows) AS BIGINT) AS n_rows,
  CAST(COUNT(DISTINCT patient_id) AS BIGINT) AS patients
FROM audit_used
GROUP BY source_table, code_system, code
"""

# A group of rows matched by any evidence counts once, whatever the number of evidences: the
# rows no evidence matches are counted on their own, so matched + unmatched = used is a check.
_TOTALS = """
SELECT
  u.source_table,
  CAST(SUM(u.n_rows) AS BIGINT) AS used_rows,
  CAST(SUM(CASE WHEN k.source_table IS NOT NULL THEN u.n_rows ELSE 0 END) AS BIGINT)
    AS matched_rows,
  CAST(SUM(CASE WHEN k.source_table IS NULL THEN u.n_rows ELSE 0 END) AS BIGINT)
    AS unmatched_rows
FROM audit_used AS u
LEFT JOIN (
  SELECT DISTINCT source_table, raw_system, raw_code, raw_source, duration_days
  FROM audit_matched
) AS k ON :same_group
GROUP BY u.source_table
"""


def _table_rows(ctx: CompileContext, table: str) -> exp.Query:
    """One coded table's rows (grouped when duplicates are checked) with the audit's columns."""
    source = DIAGNOSES if table == "diagnoses" else PRESCRIPTIONS
    check = ctx.study.quality.exact_duplicates == "check"
    grouped = grouped_rows(source, check_duplicates=check).subquery("g")
    date_column = "event_date" if table == "diagnoses" else "start_date"
    row_date = exp.TryCast(this=exp.column(date_column), to=exp.DataType.build("DATE"))
    if table == "prescriptions":
        stop = exp.TryCast(this=exp.column("stop_date"), to=exp.DataType.build("DATE"))
        duration: exp.Expression = exp.cast(days_between(row_date.copy(), stop) + 1, "INT")
    else:
        duration = exp.cast(exp.null(), "INT")
    return exp.select(
        "patient_id",
        exp.column(SOURCE_PROBLEM),
        row_date.as_("row_date"),
        exp.Literal.string(table).as_("source_table"),
        *(c.as_(n) for n, c in raw_code_columns(table).items()),
        duration.as_("duration_days"),
    ).from_(grouped)


def _same_group(left: str, right: str) -> exp.Expression:
    """Two audit relations on the same raw code and prescription length (NULLs equal)."""
    same = [
        exp.NullSafeEQ(this=exp.column(c, left), expression=exp.column(c, right))
        for c in ("raw_system", "raw_code", "raw_source", "duration_days")
    ]
    return exp.and_(exp.column("source_table", left).eq(exp.column("source_table", right)), *same)


def audit_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """The audit's own stages, to run after the study's plan through ``codes_to_evidence``."""
    parts = [_table_rows(ctx, t) for t in coded_tables(ctx)]
    rows = parts[0] if len(parts) == 1 else parts[0].union(parts[1], distinct=False)
    sources = tuple(f"src_{t}" for t in coded_tables(ctx))
    return (
        Stage(
            "audit_used",
            query(
                _USED,
                rows=rows.subquery("r"),
                same_code=same_raw_code("r", "c"),
                end_of_data=ctx.study.end_of_data,
                base=exp.to_table(names.PATIENT_BASE),
                found_codes=exp.to_table(names.DISTINCT_CODES),
            ),
            (*sources, names.PATIENT_BASE, names.DISTINCT_CODES),
            "the usable coded rows, one pass per table, grouped by code, patient and year",
        ),
        Stage(
            "audit_matched",
            query(
                _MATCHED,
                same_code=same_raw_code("u", "m"),
                matches=exp.to_table(names.CODES_TO_EVIDENCE),
            ),
            ("audit_used", names.CODES_TO_EVIDENCE),
            "each group of usable rows with each evidence its code counts for",
        ),
        Stage(
            "audit_code_counts",
            query(_CODE_COUNTS),
            ("audit_matched",),
            "rows, patients, first and last year of each matched code, per evidence",
        ),
        Stage(
            "audit_code_years",
            query(_CODE_YEARS),
            ("audit_matched",),
            "rows and patients of each matched code per calendar year (coding drift)",
        ),
        Stage(
            "audit_extract_codes",
            query(_EXTRACT_CODES),
            ("audit_used",),
            "rows and patients of every usable extract code, for the near misses",
        ),
        Stage(
            "audit_totals",
            query(_TOTALS, same_group=_same_group("u", "k")),
            ("audit_used", "audit_matched"),
            "used rows per table: matched by some evidence, and not",
        ),
    )


def audit_plan(plan: Plan, ctx: CompileContext) -> Plan:
    """The study's stages that the audit reads, then the audit's own, with its outputs.

    Raises:
        KeyError: The study reads no coded evidence (no ``codes_to_evidence`` stage).
    """
    plan.stage(names.CODES_TO_EVIDENCE)
    audit = audit_stages(ctx)
    needed = {d for stage in audit for d in stage.depends_on}
    for stage in reversed(plan.stages):
        if stage.name in needed:
            needed.update(stage.depends_on)
    stages = (*(s for s in plan.stages if s.name in needed), *audit)
    sources = tuple(s for s in plan.sources if s.relation in needed)
    return Plan(plan.study, sources, stages, ()).with_outputs(
        (*AUDIT_OUTPUTS, names.CODES_TO_EVIDENCE)
    )
