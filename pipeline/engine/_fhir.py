"""Read a FHIR R4 bulk-data export (NDJSON, one resource per line) as the canonical tables.

Each builder returns a SELECT over the export's files with the canonical column names, all as
text, as if the table had come from a CSV file; the stages that follow parse and judge the
values exactly as they do for CSV, so every row a builder yields is used or counted in the
quality log. The files are read by DuckDB's JSON reader with an explicit column list, so a
field no resource carries is simply NULL and nothing depends on type detection.

Resources map to rows as follows (the Bulk Data file name says which type a file holds):

- ``Patient`` -> ``patients``: ``id``; ``birthDate`` (a year-only date gives ``birth_year`` and
  no ``birth_date``, so the 1 July convention of the canonical pipeline applies);
  ``gender`` female/male/other/unknown -> F/M/U/U; ``deceasedDateTime``; the id part of
  ``managingOrganization.reference`` as ``practice_id``. ``deceasedBoolean`` is not read: a
  patient known to be dead without a date has no death date and is followed as alive.
- ``Encounter`` -> ``encounters``: ``subject``, ``period.start``, ``class.code`` lower-cased.
- ``Condition`` -> ``diagnoses``: one row per distinct ICD-10 or ICD-9-CM coding (chosen by
  system URI; other codings such as SNOMED CT are ignored). A Condition with no such coding
  still gives one row, carrying its first coding's system URI and code (or NULLs when it has
  none), so the quality log counts it as an unknown code system instead of losing it. The
  date is ``onsetDateTime``, else ``onsetPeriod.start``, else ``recordedDate``; ``source`` is
  ``problem_list`` when a category is ``problem-list-item``, else ``visit``.
- ``MedicationRequest`` and ``MedicationStatement`` -> ``prescriptions``: one row per distinct
  ATC coding of ``medicationCodeableConcept`` (one row with no ``atc`` when there is none).
  Requests start at ``authoredOn`` and stop at the first dosage instruction's
  ``timing.repeat.boundsPeriod.end``, else ``dispenseRequest.validityPeriod.end``; statements
  use ``effectiveDateTime`` or ``effectivePeriod``.
- ``Observation`` -> ``measurements``: one row per distinct measure its LOINC codings map to
  (:data:`LOINC_MEASURES`); an observation with ``component`` entries (a blood pressure panel)
  gives one row per component instead. Unmapped LOINC codes give ``measure`` =
  ``loinc:<code>`` (counted as an unknown measure). ``valueQuantity`` gives ``value`` and
  ``unit`` (the UCUM code when the system is UCUM, else the printed unit); a comparator
  (``<``, ``>=``...) is kept by writing the value as text, e.g. ``>90``; ``valueString`` and
  the text of ``valueCodeableConcept`` (else its first coding's display), lower-cased, give
  ``value_text``.

Dates keep the date part as written (no time-zone shift). A partial date takes the middle of
what it names, as the canonical pipeline does for a birth year: ``2016`` -> 2016-07-01 and
``2016-03`` -> 2016-03-15. Resource ``status`` (entered-in-error, cancelled, not-taken ...) is
not read.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Mapping, Sequence
from functools import lru_cache
from pathlib import Path

import sqlglot
from sqlglot import exp

from pipeline.extract import ExtractTable

log = logging.getLogger(__name__)

ICD_SYSTEMS = {
    "http://hl7.org/fhir/sid/icd-10": "ICD10",
    "http://hl7.org/fhir/sid/icd-10-cm": "ICD10",
    "http://hl7.org/fhir/sid/icd-9-cm": "ICD9",
}
ATC_SYSTEM = "http://www.whocc.no/atc"
LOINC_SYSTEM = "http://loinc.org"
UCUM_SYSTEM = "http://unitsofmeasure.org"

# LOINC codes read as our measures (codes and their meaning from loinc.org, as of 2024).
LOINC_MEASURES = {
    "4548-4": "hba1c",  # Hemoglobin A1c/Hemoglobin.total in Blood (%)
    "17856-6": "hba1c",  # Hemoglobin A1c/Hemoglobin.total in Blood by HPLC (%)
    "2160-0": "creatinine",  # Creatinine [Mass/volume] in Serum or Plasma (mg/dL)
    "14682-9": "creatinine",  # Creatinine [Moles/volume] in Serum or Plasma (umol/L)
    "33914-3": "egfr",  # eGFR/1.73 sq M, MDRD
    "62238-1": "egfr",  # eGFR/1.73 sq M, CKD-EPI
    "98979-8": "egfr",  # eGFR/1.73 sq M, CKD-EPI 2021
    "8480-6": "sbp",
    "8462-4": "dbp",
    "39156-5": "bmi",
    "29463-7": "weight",
    "8302-2": "height",
    "2093-3": "total_cholesterol",
    "13457-7": "ldl",  # calculated
    "18262-6": "ldl",  # direct assay
    "72166-2": "smoking",  # Tobacco smoking status
}

# The fields read from each resource type, and the DuckDB type each is read as.
READ_COLUMNS: dict[str, dict[str, str]] = {
    "Patient": {
        "id": "VARCHAR",
        "birthDate": "VARCHAR",
        "gender": "VARCHAR",
        "deceasedDateTime": "VARCHAR",
        "managingOrganization": "JSON",
    },
    "Encounter": {"subject": "JSON", "period": "JSON", "class": "JSON"},
    "Condition": {
        "subject": "JSON",
        "onsetDateTime": "VARCHAR",
        "onsetPeriod": "JSON",
        "recordedDate": "VARCHAR",
        "code": "JSON",
        "category": "JSON",
    },
    "MedicationRequest": {
        "subject": "JSON",
        "authoredOn": "VARCHAR",
        "dosageInstruction": "JSON",
        "dispenseRequest": "JSON",
        "medicationCodeableConcept": "JSON",
    },
    "MedicationStatement": {
        "subject": "JSON",
        "effectiveDateTime": "VARCHAR",
        "effectivePeriod": "JSON",
        "medicationCodeableConcept": "JSON",
    },
    "Observation": {
        "subject": "JSON",
        "effectiveDateTime": "VARCHAR",
        "effectivePeriod": "JSON",
        "effectiveInstant": "VARCHAR",
        "code": "JSON",
        "valueQuantity": "JSON",
        "valueString": "VARCHAR",
        "valueCodeableConcept": "JSON",
        "component": "JSON",
    },
}

_FULL_DATE = "^[0-9]{4}-[0-9]{2}-[0-9]{2}"
_YEAR = "^[0-9]{4}$"
_YEAR_MONTH = "^[0-9]{4}-[0-9]{2}$"


def _fhir_date(text: exp.Expression) -> exp.Expression:
    """A FHIR date/dateTime/instant as ``YYYY-MM-DD`` text; other text is passed on as is."""
    value = exp.Trim(this=text)

    def matches(pattern: str) -> exp.Expression:
        return exp.func("REGEXP_MATCHES", value.copy(), exp.Literal.string(pattern))

    return (
        exp.Case()
        .when(matches(_YEAR), exp.DPipe(this=value.copy(), expression=exp.Literal.string("-07-01")))
        .when(
            matches(_YEAR_MONTH), exp.DPipe(this=value.copy(), expression=exp.Literal.string("-15"))
        )
        .when(matches(_FULL_DATE), exp.func("LEFT", value.copy(), exp.Literal.number(10)))
        .else_(value.copy())
    )


def _reference_id(reference: exp.Expression, resource_type: exp.Expression) -> exp.Expression:
    """The id in a reference to a resource of the given type (relative or absolute URL)."""
    if not isinstance(resource_type, exp.Literal) or not resource_type.this.isalpha():
        raise ValueError("REF_ID needs a resource type literal")
    pattern = f"(?:^|/){resource_type.this}/([^/]+)(?:/_history/.*)?$"
    extracted = exp.RegexpExtract(
        this=reference, expression=exp.Literal.string(pattern), group=exp.Literal.number(1)
    )
    return exp.func("NULLIF", extracted, exp.Literal.string(""))


_MACROS: dict[str, Callable[..., exp.Expression]] = {
    "FHIR_DATE": _fhir_date,
    "REF_ID": _reference_id,
}


@lru_cache(maxsize=32)
def _parse(text: str) -> exp.Expression:
    return sqlglot.parse_one(text, dialect="duckdb")


def _fill(text: str, **values: exp.Expression) -> exp.Select:
    """Parse a constant template, fill ``:name`` placeholders and expand our two macros."""

    def replace(node: exp.Expression) -> exp.Expression:
        if isinstance(node, exp.Placeholder):
            return values[node.name].copy()
        if isinstance(node, exp.Anonymous) and node.name.upper() in _MACROS:
            return _MACROS[node.name.upper()](*node.expressions)
        return node

    tree = _parse(text).transform(replace)
    if not isinstance(tree, exp.Select):
        raise TypeError("the template is not a SELECT")
    return tree


def _reader(resource_type: str, files: Sequence[Path]) -> exp.Expression:
    """The files of one resource type as a relation; an empty one when there are none."""
    columns = READ_COLUMNS[resource_type]
    if not files:
        empty = exp.select(
            *(exp.cast(exp.null(), kind).as_(name, quoted=True) for name, kind in columns.items())
        ).where(exp.false())
        return empty.subquery("r")
    spec = exp.Struct(
        expressions=[
            exp.PropertyEQ(this=exp.Literal.string(name), expression=exp.Literal.string(kind))
            for name, kind in columns.items()
        ]
    )
    options = {"format": exp.Literal.string("newline_delimited"), "columns": spec}
    read = exp.func(
        "read_json",
        exp.Array(expressions=[exp.Literal.string(str(f)) for f in files]),
        *(exp.PropertyEQ(this=exp.var(k), expression=v) for k, v in options.items()),
    )
    return exp.Table(this=read, alias=exp.TableAlias(this=exp.to_identifier("r")))


def _strings(items: Sequence[str]) -> exp.Expression:
    return exp.Tuple(expressions=[exp.Literal.string(i) for i in sorted(items)])


def _lookup(key: exp.Expression, mapping: Mapping[str, str]) -> exp.Expression:
    case = exp.Case(this=key)
    for k, v in sorted(mapping.items()):
        case = case.when(exp.Literal.string(k), exp.Literal.string(v))
    return case


Files = Mapping[str, Sequence[Path]]

_PATIENTS = """
SELECT
  id AS patient_id,
  CASE WHEN REGEXP_MATCHES(TRIM(birthDate), :year) THEN NULL ELSE FHIR_DATE(birthDate) END
    AS birth_date,
  CASE WHEN REGEXP_MATCHES(TRIM(birthDate), :year) THEN TRIM(birthDate) END AS birth_year,
  CASE gender
    WHEN 'female' THEN 'F' WHEN 'male' THEN 'M' WHEN 'other' THEN 'U' WHEN 'unknown' THEN 'U'
    ELSE gender
  END AS sex,
  FHIR_DATE(deceasedDateTime) AS death_date,
  REF_ID(json_extract_string(managingOrganization, '$.reference'), 'Organization')
    AS practice_id
FROM :patient
"""


def fhir_patients(files: Files) -> exp.Select:
    """``patients`` from Patient resources."""
    return _fill(
        _PATIENTS,
        year=exp.Literal.string(_YEAR),
        patient=_reader("Patient", files.get("Patient", ())),
    )


_ENCOUNTERS = """
SELECT
  REF_ID(json_extract_string(subject, '$.reference'), 'Patient') AS patient_id,
  FHIR_DATE(json_extract_string(period, '$.start')) AS encounter_date,
  LOWER(json_extract_string("class", '$.code')) AS encounter_type
FROM :encounter
"""


def fhir_encounters(files: Files) -> exp.Select:
    """``encounters`` from Encounter resources."""
    return _fill(_ENCOUNTERS, encounter=_reader("Encounter", files.get("Encounter", ())))


_DIAGNOSES = """
SELECT patient_id, event_date, coding.code_system AS code_system, coding.code AS code, source
FROM (
  SELECT
    patient_id,
    event_date,
    source,
    UNNEST(
      CASE WHEN LEN(usable) > 0 THEN usable
      ELSE [{
        'code_system': json_extract_string(code, '$.coding[0].system'),
        'code': json_extract_string(code, '$.coding[0].code')
      }]
      END
    ) AS coding
  FROM (
    SELECT
      REF_ID(json_extract_string(subject, '$.reference'), 'Patient') AS patient_id,
      FHIR_DATE(
        COALESCE(onsetDateTime, json_extract_string(onsetPeriod, '$.start'), recordedDate)
      ) AS event_date,
      CASE
        WHEN LIST_CONTAINS(json_extract_string(category, '$[*].coding[*].code'),
          'problem-list-item') THEN 'problem_list'
        ELSE 'visit'
      END AS source,
      code,
      ARRAY(
        SELECT DISTINCT {'code_system': :label, 'code': json_extract_string(c, '$.code')}
        FROM (SELECT UNNEST(json_extract(code, '$.coding[*]')) AS c) AS codings
        WHERE json_extract_string(c, '$.system') IN :systems
      ) AS usable
    FROM :condition
  ) AS conditions
) AS flat
"""


def fhir_diagnoses(files: Files) -> exp.Select:
    """``diagnoses`` from Condition resources: one row per distinct ICD coding."""
    system = exp.func("json_extract_string", exp.column("c"), exp.Literal.string("$.system"))
    return _fill(
        _DIAGNOSES,
        label=_lookup(system, ICD_SYSTEMS),
        systems=_strings(list(ICD_SYSTEMS)),
        condition=_reader("Condition", files.get("Condition", ())),
    )


_PRESCRIPTIONS = """
SELECT patient_id, start_date, stop_date, atc, drug_text
FROM (
  SELECT
    patient_id,
    start_date,
    stop_date,
    UNNEST(CASE WHEN LEN(usable) > 0 THEN usable ELSE [NULL] END) AS atc,
    drug_text
  FROM (
    SELECT
      patient_id,
      start_date,
      stop_date,
      json_extract_string(medication, '$.text') AS drug_text,
      ARRAY(
        SELECT DISTINCT json_extract_string(c, '$.code')
        FROM (SELECT UNNEST(json_extract(medication, '$.coding[*]')) AS c) AS codings
        WHERE json_extract_string(c, '$.system') = :atc_system
      ) AS usable
    FROM (
      SELECT
        REF_ID(json_extract_string(subject, '$.reference'), 'Patient') AS patient_id,
        FHIR_DATE(authoredOn) AS start_date,
        FHIR_DATE(COALESCE(
          json_extract_string(dosageInstruction, '$[0].timing.repeat.boundsPeriod.end'),
          json_extract_string(dispenseRequest, '$.validityPeriod.end')
        )) AS stop_date,
        medicationCodeableConcept AS medication
      FROM :request
      UNION ALL
      SELECT
        REF_ID(json_extract_string(subject, '$.reference'), 'Patient') AS patient_id,
        FHIR_DATE(COALESCE(effectiveDateTime, json_extract_string(effectivePeriod, '$.start')))
          AS start_date,
        FHIR_DATE(json_extract_string(effectivePeriod, '$.end')) AS stop_date,
        medicationCodeableConcept AS medication
      FROM :statement
    ) AS medications
  ) AS coded
) AS flat
"""


def fhir_prescriptions(files: Files) -> exp.Select:
    """``prescriptions`` from MedicationRequest and MedicationStatement resources."""
    return _fill(
        _PRESCRIPTIONS,
        atc_system=exp.Literal.string(ATC_SYSTEM),
        request=_reader("MedicationRequest", files.get("MedicationRequest", ())),
        statement=_reader("MedicationStatement", files.get("MedicationStatement", ())),
    )


_MEASUREMENTS = """
SELECT
  patient_id,
  obs_date,
  measure,
  CASE
    WHEN value_string IS NOT NULL THEN value_string
    WHEN comparator IS NOT NULL THEN comparator || quantity_value
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
  END AS unit
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
    json_extract_string(quantity, '$.value') AS quantity_value,
    json_extract_string(quantity, '$.comparator') AS comparator,
    value_string,
    concept
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
        valueString AS value_string, valueCodeableConcept AS concept
      FROM observations
      WHERE COALESCE(json_array_length(component), 0) = 0
      UNION ALL
      SELECT
        patient_id, obs_date, json_extract(part, '$.code') AS part_code,
        json_extract(part, '$.valueQuantity') AS quantity,
        json_extract_string(part, '$.valueString') AS value_string,
        json_extract(part, '$.valueCodeableConcept') AS concept
      FROM (
        SELECT patient_id, obs_date, UNNEST(json_extract(component, '$[*]')) AS part
        FROM observations
        WHERE json_array_length(component) > 0
      ) AS components
    ) AS parts
  ) AS mapped
) AS flat
"""

_OBSERVATIONS = """
SELECT
  REF_ID(json_extract_string(subject, '$.reference'), 'Patient') AS patient_id,
  FHIR_DATE(COALESCE(
    effectiveDateTime, json_extract_string(effectivePeriod, '$.start'), effectiveInstant
  )) AS obs_date,
  code, valueQuantity, valueString, valueCodeableConcept, component
FROM :observation
"""


def fhir_measurements(files: Files) -> exp.Select:
    """``measurements`` from Observation resources (and their components)."""
    code = exp.func("json_extract_string", exp.column("c"), exp.Literal.string("$.code"))
    observations = _fill(
        _OBSERVATIONS, observation=_reader("Observation", files.get("Observation", ()))
    )
    select = _fill(
        _MEASUREMENTS,
        ucum=exp.Literal.string(UCUM_SYSTEM),
        loinc_system=exp.Literal.string(LOINC_SYSTEM),
        measure=_lookup(code, LOINC_MEASURES),
    )
    return select.with_("observations", as_=observations)


BUILDERS: dict[str, Callable[[Files], exp.Select]] = {
    "patients": fhir_patients,
    "encounters": fhir_encounters,
    "diagnoses": fhir_diagnoses,
    "prescriptions": fhir_prescriptions,
    "measurements": fhir_measurements,
}


def fhir_source(table: ExtractTable) -> exp.Select:
    """The canonical rows of one table of a FHIR export, as a SELECT over its NDJSON files."""
    files: dict[str, list[Path]] = {}
    for path, resource_type in zip(table.files, table.resources, strict=True):
        files.setdefault(resource_type, []).append(path)
    for resource_type in sorted(set(READ_COLUMNS) - set(files)):
        log.debug("no %s files for table %s", resource_type, table.name)
    return BUILDERS[table.name](files)
