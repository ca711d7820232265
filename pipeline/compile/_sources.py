"""Stages that read the extract once per table and keep only rows the study may use.

A row is usable when its date parses, its patient is in ``patients``, it is dated on or before
the end of data and not after the patient's death. Each table is read in one pass.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.codes import normalised_code_sql
from pipeline.compile._context import CompileContext
from pipeline.compile._plan import SOURCE_POSITION, SourceTable, Stage
from pipeline.compile._sql import days_between, is_in, query, value
from pipeline.config import Study

PATIENTS = SourceTable(
    "patients",
    required=("patient_id", "sex", "death_date"),
    one_of=(("birth_date", "birth_year"),),
    optional=("practice_id", "registration_date", "deregistration_date"),
)
ENCOUNTERS = SourceTable(
    "encounters", required=("patient_id", "encounter_date"), optional=("encounter_type",)
)
DIAGNOSES = SourceTable(
    "diagnoses", required=("patient_id", "event_date", "code_system", "code"), optional=("source",)
)
PRESCRIPTIONS = SourceTable(
    "prescriptions", required=("patient_id", "start_date", "atc"), optional=("stop_date",)
)
MEASUREMENTS = SourceTable(
    "measurements",
    required=("patient_id", "obs_date", "measure", "unit"),
    one_of=(("value", "value_text"),),
)


def grouped_rows(
    table: SourceTable, *, check_duplicates: bool, where: exp.Expression | None = None
) -> exp.Query:
    """Distinct rows of a source table with how many copies of each the extract holds.

    A row's position is its first copy's. Without the duplicate check every row stands alone
    (``copies`` is 1): no grouping.
    """
    rows = exp.select(*table.columns).from_(table.relation)
    if where is not None:
        rows = rows.where(where)
    if not check_duplicates:
        return rows.select(exp.column(SOURCE_POSITION), exp.Literal.number(1).as_("copies"))
    first = exp.func("MIN", exp.column(SOURCE_POSITION)).as_(SOURCE_POSITION)
    copies = exp.func("COUNT", exp.Star()).as_("copies")
    return rows.select(first, copies).group_by(*table.columns)


def source_tables(ctx: CompileContext) -> tuple[SourceTable, ...]:
    """The extract tables this study reads."""
    tables = [PATIENTS, ENCOUNTERS]
    if ctx.uses("diagnosis"):
        tables.append(DIAGNOSES)
    if ctx.uses("prescription"):
        tables.append(PRESCRIPTIONS)
    if ctx.measures:
        tables.append(MEASUREMENTS)
    return tuple(tables)


_PATIENT_BASE = """
SELECT DISTINCT
  patient_id,
  COALESCE(
    TRY_CAST(birth_date AS DATE), MAKE_DATE(TRY_CAST(birth_year AS INT), 7, 1)
  ) AS birth_date,
  NULLIF(UPPER(TRIM(CAST(sex AS VARCHAR))), '') AS sex,
  TRY_CAST(death_date AS DATE) AS death_date,
  NULLIF(TRIM(CAST(practice_id AS VARCHAR)), '') AS practice_id,
  TRY_CAST(registration_date AS DATE) AS registration_date,
  TRY_CAST(deregistration_date AS DATE) AS deregistration_date
FROM src_patients
WHERE patient_id IS NOT NULL
"""

_PATIENT_DUPLICATES = """
SELECT patient_id, COUNT(*) AS n_rows
FROM patient_base
GROUP BY patient_id
HAVING COUNT(*) > 1
ORDER BY patient_id
LIMIT 5
"""

_ENCOUNTER_ROWS = """
SELECT e.patient_id, e.encounter_date, e.encounter_type
FROM (
  SELECT
    patient_id,
    TRY_CAST(encounter_date AS DATE) AS encounter_date,
    LOWER(TRIM(CAST(encounter_type AS VARCHAR))) AS encounter_type
  FROM src_encounters
) AS e
JOIN patient_base AS p ON p.patient_id = e.patient_id
WHERE e.encounter_date <= :end_of_data
  AND (p.death_date IS NULL OR e.encounter_date <= p.death_date)
"""

# The first encounter in the index window is found in the same pass when the study indexes on it.
_ENCOUNTER_SUMMARY = """
SELECT
  patient_id,
  MIN(encounter_date) AS first_encounter,
  MAX(encounter_date) AS last_encounter,
  MIN(CASE WHEN :in_window THEN encounter_date END) AS first_in_window
FROM encounter_rows
GROUP BY patient_id
"""

_DIAGNOSIS_ROWS = """
SELECT
  patient_id,
  TRY_CAST(event_date AS DATE) AS event_date,
  UPPER(TRIM(CAST(code_system AS VARCHAR))) AS code_system,
  :code AS code,
  CAST(code AS VARCHAR) AS raw_code,
  LOWER(TRIM(CAST(source AS VARCHAR))) AS source,
  CAST(NULL AS INT) AS duration_days
FROM src_diagnoses
"""

_PRESCRIPTION_ROWS = """
SELECT
  patient_id,
  TRY_CAST(start_date AS DATE) AS event_date,
  'ATC' AS code_system,
  :code AS code,
  CAST(atc AS VARCHAR) AS raw_code,
  CAST(NULL AS VARCHAR) AS source,
  CAST(:duration + 1 AS INT) AS duration_days
FROM src_prescriptions
"""

_CODED_EVENTS = """
SELECT r.patient_id, r.event_date, r.code_system, r.code, r.raw_code, r.source, r.duration_days
FROM :rows AS r
JOIN patient_base AS p ON p.patient_id = r.patient_id
WHERE r.event_date <= :end_of_data
  AND (p.death_date IS NULL OR r.event_date <= p.death_date)
"""


def source_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """Stages that turn raw extract tables into typed, usable rows."""
    study = ctx.study
    stages = [
        Stage(
            "patient_base",
            query(_PATIENT_BASE),
            ("src_patients",),
            "one typed row per patient: birth date (1 July when only the year is known), sex",
        ),
        Stage(
            "patient_duplicates",
            query(_PATIENT_DUPLICATES),
            ("patient_base",),
            "patients must be listed once",
            kind="check",
            failure="the patients table lists the same patient_id with different values",
        ),
        Stage(
            "encounter_rows",
            query(_ENCOUNTER_ROWS, end_of_data=study.end_of_data),
            ("src_encounters", "patient_base"),
            "usable encounters: a readable date, a known patient, not after death or end of data",
            kind="view",
        ),
        Stage(
            "encounter_summary",
            query(_ENCOUNTER_SUMMARY, in_window=_index_window(study)),
            ("encounter_rows",),
            "first and last usable encounter per patient (and the first in the index window)",
        ),
    ]
    if ctx.uses_coded_events:
        parts = []
        if ctx.uses("diagnosis"):
            parts.append(query(_DIAGNOSIS_ROWS, code=normalised_code_sql(exp.column("code"))))
        if ctx.uses("prescription"):
            duration = days_between(
                exp.TryCast(this=exp.column("start_date"), to=exp.DataType.build("DATE")),
                exp.TryCast(this=exp.column("stop_date"), to=exp.DataType.build("DATE")),
            )
            parts.append(
                query(
                    _PRESCRIPTION_ROWS,
                    code=normalised_code_sql(exp.column("atc")),
                    duration=duration,
                )
            )
        rows = parts[0] if len(parts) == 1 else parts[0].union(parts[1], distinct=False)
        stages.append(
            Stage(
                "coded_events",
                query(_CODED_EVENTS, rows=rows.subquery(), end_of_data=study.end_of_data),
                (*_coded_sources(ctx), "patient_base"),
                "usable diagnosis and prescription rows with normalised codes",
                kind="view",
            )
        )
    return tuple(stages)


def _index_window(study: Study) -> exp.Expression:
    rule = study.index.first_encounter
    if rule is None:
        return exp.false()
    start, end = rule.between
    inside = exp.column("encounter_date").between(value(start), value(end))
    if rule.type:
        inside = exp.and_(
            inside, is_in(exp.column("encounter_type"), [t.lower() for t in rule.type])
        )
    return inside


def _coded_sources(ctx: CompileContext) -> tuple[str, ...]:
    used = (
        ("src_diagnoses", ctx.uses("diagnosis")),
        ("src_prescriptions", ctx.uses("prescription")),
    )
    return tuple(name for name, is_used in used if is_used)
