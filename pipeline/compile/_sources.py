"""Stages that read the extract once per table and keep only rows the study may use.

A row is usable when its date parses, its patient is in ``patients``, it is dated on or before
the end of data and not after the patient's death. Each table is read in one pass.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.codes import normalised_code_sql
from pipeline.compile._context import CompileContext
from pipeline.compile._plan import SourceTable, Stage
from pipeline.compile._sql import age_in_years, is_in, query, values_table
from pipeline.measures import MEASURES, conversion_rows

PATIENTS = SourceTable(
    "patients",
    required=("patient_id", "sex", "death_date"),
    one_of=(("birth_date", "birth_year"),),
    optional=("practice_id",),
)
ENCOUNTERS = SourceTable("encounters", required=("patient_id", "encounter_date"))
DIAGNOSES = SourceTable(
    "diagnoses", required=("patient_id", "event_date", "code_system", "code"), optional=("source",)
)
PRESCRIPTIONS = SourceTable("prescriptions", required=("patient_id", "start_date", "atc"))
MEASUREMENTS = SourceTable(
    "measurements",
    required=("patient_id", "obs_date", "measure", "unit"),
    one_of=(("value", "value_text"),),
)


def source_tables(ctx: CompileContext) -> tuple[SourceTable, ...]:
    """The extract tables this study reads."""
    tables = [PATIENTS, ENCOUNTERS]
    if ctx.uses_diagnoses:
        tables.append(DIAGNOSES)
    if ctx.uses_prescriptions:
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
  TRY_CAST(death_date AS DATE) AS death_date
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

_ENCOUNTER_SUMMARY = """
SELECT
  e.patient_id,
  MIN(e.encounter_date) AS first_encounter,
  MAX(e.encounter_date) AS last_encounter,
  MIN(e.encounter_date) FILTER (WHERE e.encounter_date BETWEEN :index_start AND :index_end)
    AS index_date
FROM (
  SELECT patient_id, TRY_CAST(encounter_date AS DATE) AS encounter_date FROM src_encounters
) AS e
JOIN patient_base AS p ON p.patient_id = e.patient_id
WHERE e.encounter_date <= :end_of_data
  AND (p.death_date IS NULL OR e.encounter_date <= p.death_date)
GROUP BY e.patient_id
"""

_DIAGNOSIS_ROWS = """
SELECT
  patient_id,
  TRY_CAST(event_date AS DATE) AS event_date,
  UPPER(TRIM(CAST(code_system AS VARCHAR))) AS code_system,
  :code AS code,
  LOWER(TRIM(CAST(source AS VARCHAR))) AS source
FROM src_diagnoses
"""

_PRESCRIPTION_ROWS = """
SELECT
  patient_id,
  TRY_CAST(start_date AS DATE) AS event_date,
  'ATC' AS code_system,
  :code AS code,
  CAST(NULL AS VARCHAR) AS source
FROM src_prescriptions
"""

_CODED_EVENTS = """
SELECT r.patient_id, r.event_date, r.code_system, r.code, r.source
FROM :rows AS r
JOIN patient_base AS p ON p.patient_id = r.patient_id
WHERE r.event_date <= :end_of_data
  AND (p.death_date IS NULL OR r.event_date <= p.death_date)
"""

_MEASUREMENT_ROWS = """
SELECT
  m.patient_id,
  m.obs_date,
  m.measure,
  u.factor * m.value / u.divisor + u.offset_value AS value,
  u.low,
  u.high
FROM (
  SELECT
    patient_id,
    TRY_CAST(obs_date AS DATE) AS obs_date,
    LOWER(TRIM(CAST(measure AS VARCHAR))) AS measure,
    CASE
      WHEN value IS NULL OR TRIM(CAST(value AS VARCHAR)) = ''
        THEN TRY_CAST(TRIM(CAST(value_text AS VARCHAR)) AS DOUBLE)
      ELSE TRY_CAST(value AS DOUBLE)
    END AS value,
    TRIM(CAST(unit AS VARCHAR)) AS unit
  FROM src_measurements
) AS m
JOIN :units ON u.measure = m.measure AND u.unit = m.unit
JOIN patient_base AS p ON p.patient_id = m.patient_id
WHERE :wanted
  AND m.obs_date <= :end_of_data
  AND (p.death_date IS NULL OR m.obs_date <= p.death_date)
  AND m.value IS NOT NULL
"""

_MEASUREMENT_VALUES = """
SELECT patient_id, obs_date, measure, value, FALSE AS derived
FROM measurement_rows
WHERE value BETWEEN low AND high
"""

# eGFR from creatinine by CKD-EPI 2021 (Inker et al., N Engl J Med 2021;385:1737), age in
# completed years on the measurement date. Only on days without a usable reported eGFR.
_DERIVED_EGFR = """
SELECT patient_id, obs_date, 'egfr' AS measure, egfr AS value, TRUE AS derived
FROM (
  SELECT
    c.patient_id,
    c.obs_date,
    142
      * POWER(LEAST(c.value / k.kappa, 1), k.alpha)
      * POWER(GREATEST(c.value / k.kappa, 1), -1.2)
      * POWER(0.9938, :age)
      * k.female_factor AS egfr
  FROM measurement_values AS c
  JOIN patient_base AS p ON p.patient_id = c.patient_id
  JOIN (VALUES ('F', 0.7, -0.241, 1.012), ('M', 0.9, -0.302, 1.0))
    AS k(sex, kappa, alpha, female_factor) ON k.sex = p.sex
  LEFT JOIN (
    SELECT DISTINCT patient_id, obs_date FROM measurement_values WHERE measure = 'egfr'
  ) AS r ON r.patient_id = c.patient_id AND r.obs_date = c.obs_date
  WHERE c.measure = 'creatinine' AND r.patient_id IS NULL AND p.birth_date IS NOT NULL
) AS d
WHERE egfr BETWEEN :low AND :high
"""


def source_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """Stages that turn raw extract tables into typed, usable rows."""
    study = ctx.study
    window = study.index.first_encounter.between
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
            "encounter_summary",
            query(
                _ENCOUNTER_SUMMARY,
                index_start=window[0],
                index_end=window[1],
                end_of_data=study.end_of_data,
            ),
            ("src_encounters", "patient_base"),
            "first and last usable encounter and the index date, one pass over encounters",
        ),
    ]
    if ctx.uses_coded_events:
        parts = []
        if ctx.uses_diagnoses:
            parts.append(query(_DIAGNOSIS_ROWS, code=normalised_code_sql(exp.column("code"))))
        if ctx.uses_prescriptions:
            parts.append(query(_PRESCRIPTION_ROWS, code=normalised_code_sql(exp.column("atc"))))
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
    if ctx.measures:
        stages.extend(_measurement_stages(ctx))
    return tuple(stages)


def _coded_sources(ctx: CompileContext) -> tuple[str, ...]:
    used = (("src_diagnoses", ctx.uses_diagnoses), ("src_prescriptions", ctx.uses_prescriptions))
    return tuple(name for name, is_used in used if is_used)


def _measurement_stages(ctx: CompileContext) -> list[Stage]:
    units = values_table(
        "u",
        ["measure", "unit", "factor", "divisor", "offset_value", "low", "high"],
        [row for row in conversion_rows() if row[0] in ctx.measures],
    )
    stages = [
        Stage(
            "measurement_rows",
            query(
                _MEASUREMENT_ROWS,
                units=units,
                wanted=is_in(exp.column("measure", "m"), ctx.measures),
                end_of_data=ctx.study.end_of_data,
            ),
            ("src_measurements", "patient_base"),
            "usable measurements of the measures the study needs, in canonical units",
            kind="view",
        ),
        Stage(
            "measurement_values",
            query(_MEASUREMENT_VALUES),
            ("measurement_rows",),
            "measurement values inside their plausibility range",
        ),
    ]
    if "egfr" in ctx.measures:
        low, high = MEASURES["egfr"].plausible
        stages.append(
            Stage(
                "derived_egfr",
                query(
                    _DERIVED_EGFR,
                    age=age_in_years(
                        birth=exp.column("birth_date", "p"), on=exp.column("obs_date", "c")
                    ),
                    low=low,
                    high=high,
                ),
                ("measurement_values", "patient_base"),
                "eGFR derived from creatinine by CKD-EPI 2021 where no eGFR was reported",
            )
        )
    return stages
