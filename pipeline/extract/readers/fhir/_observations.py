"""Observations read as ``measurements`` (see :mod:`pipeline.extract.readers.fhir._resources`).

Kept apart from the other builders so each module stays small. An Observation is named by its
LOINC codings: the codes of the study's measure files when the plan gives them, else the
reader's own :data:`~pipeline.extract.readers.fhir._codes.LOINC_MEASURES`.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.extract.readers.fhir._codes import (
    LOINC_MEASURES,
    LOINC_SYSTEM,
    SNOMED_SMOKING,
    SNOMED_SYSTEM,
    UCUM_SYSTEM,
)
from pipeline.extract.readers.fhir._read import (
    Files,
    fill,
    lookup,
    read_type,
    row_problem,
    status_problem,
)
from pipeline.extract.schema import SourceTable

_MEASUREMENTS = """
SELECT
  patient_id,
  obs_date,
  measure,
  CASE
    WHEN value_string IS NOT NULL THEN value_string
    WHEN comparator IS NOT NULL THEN comparator || quantity_value
    WHEN smoking IS NOT NULL THEN smoking
    ELSE LOWER(COALESCE(
      json_extract_string(concept, '$.text'), json_extract_string(concept, '$.coding[0].display')
    ))
  END AS value_text,
  CASE WHEN value_string IS NULL AND comparator IS NULL THEN quantity_value END AS value,
  CASE
    WHEN json_extract_string(quantity, '$.system') = :ucum
      THEN COALESCE(
        json_extract_string(quantity, '$.code'), json_extract_string(quantity, '$.unit')
      )
    ELSE COALESCE(json_extract_string(quantity, '$.unit'), json_extract_string(quantity, '$.code'))
  END AS unit,
  source_position,
  source_problem
FROM (
  SELECT
    patient_id,
    obs_date,
    UNNEST(
      CASE
        WHEN LEN(measures) > 0 THEN measures
        ELSE ['loinc:' || loinc[1]]
      END
    ) AS measure,
    quantity,
    COALESCE(json_extract_string(quantity, '$.value'), value_integer) AS quantity_value,
    json_extract_string(quantity, '$.comparator') AS comparator,
    value_string,
    concept,
    ARRAY(
      SELECT :smoking
      FROM (SELECT UNNEST(json_extract(concept, '$.coding[*]')) AS c) AS codings
      WHERE json_extract_string(c, '$.system') = :snomed AND :smoking IS NOT NULL
    )[1] AS smoking,
    source_position,
    source_problem
  FROM (
    SELECT
      *,
      ARRAY(
        SELECT DISTINCT :measure
        FROM (SELECT UNNEST(json_extract(part_code, '$.coding[*]')) AS c) AS codings
        WHERE json_extract_string(c, '$.system') = :loinc_system AND :measure IS NOT NULL
      ) AS measures,
      ARRAY(
        SELECT json_extract_string(c, '$.code')
        FROM (SELECT UNNEST(json_extract(part_code, '$.coding[*]')) AS c) AS codings
        WHERE json_extract_string(c, '$.system') = :loinc_system
      ) AS loinc
    FROM (
      SELECT
        patient_id, obs_date, code AS part_code, valueQuantity AS quantity,
        valueInteger AS value_integer, valueString AS value_string,
        valueCodeableConcept AS concept, source_position, source_problem
      FROM observations
      WHERE COALESCE(json_array_length(component), 0) = 0
        OR COALESCE(valueQuantity, valueInteger, valueString, valueCodeableConcept) IS NOT NULL
      UNION ALL
      SELECT
        patient_id, obs_date, json_extract(part, '$.code') AS part_code,
        json_extract(part, '$.valueQuantity') AS quantity,
        json_extract_string(part, '$.valueInteger') AS value_integer,
        json_extract_string(part, '$.valueString') AS value_string,
        json_extract(part, '$.valueCodeableConcept') AS concept,
        source_position, source_problem
      FROM (
        SELECT *, UNNEST(json_extract(component, '$[*]')) AS part
        FROM observations
        WHERE json_array_length(component) > 0
      ) AS components
    ) AS parts
  ) AS mapped
) AS flat
"""

_OBSERVATIONS = """
SELECT
  patient_id, FHIR_DATE(date_text) AS obs_date, code, valueQuantity, valueInteger,
  valueString, valueCodeableConcept, component, source_position, :problem AS source_problem
FROM (
  SELECT
    REF_ID(json_extract_string(subject, '$.reference'), 'Patient') AS patient_id,
    COALESCE(
      effectiveDateTime, json_extract_string(effectivePeriod, '$.start'), effectiveInstant,
      issued
    ) AS date_text,
    code, valueQuantity, valueInteger, valueString, valueCodeableConcept, component,
    :status AS status_problem,
    line_problem,
    source_position
  FROM :observation
) AS o
"""


def fhir_measurements(files: Files, source: SourceTable | None = None) -> exp.Select:
    """``measurements`` from Observation resources (their own value and their components).

    Observations are named by the LOINC codes of the study's measure files when the plan
    gives them, so a measure the study defines itself (serum urate by its LOINC code) is read
    from a FHIR export as from a canonical file.
    """
    named = dict(source.measure_codes) if source is not None and source.measure_codes else {}
    code = exp.func("json_extract_string", exp.column("c"), exp.Literal.string("$.code"))
    observations = fill(
        _OBSERVATIONS,
        problem=row_problem(),
        status=status_problem("Observation", exp.column("status")),
        observation=read_type(files, "Observation"),
    )
    select = fill(
        _MEASUREMENTS,
        ucum=exp.Literal.string(UCUM_SYSTEM),
        loinc_system=exp.Literal.string(LOINC_SYSTEM),
        snomed=exp.Literal.string(SNOMED_SYSTEM),
        measure=lookup(code, named or LOINC_MEASURES),
        smoking=lookup(code.copy(), SNOMED_SMOKING),
    )
    return select.with_("observations", as_=observations)
