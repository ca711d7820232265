"""Read a FHIR R4 bulk-data export (NDJSON, one resource per line) as the canonical tables.

Each builder returns a SELECT over the export's files with the canonical column names, all as
text, as if the table had come from a CSV file, plus ``source_position`` (file and line) and
``source_problem`` (why the reader itself sets the row aside, or NULL); the stages that follow
parse and judge the values exactly as they do for CSV, so every row a builder yields is used
or counted in the quality log. Lines are read by :mod:`pipeline.extract.readers.fhir._read`:
a line that is not a JSON object is a ``malformed line``, a resource of a type other than its
file's (a Bundle, a Practitioner in ``Patient.ndjson``) is ``other resource type``; Bundles
are not unpacked.

Resources map to rows as follows (the Bulk Data file name says which type a file holds):

- ``Patient`` -> ``patients``: ``id``; ``birthDate`` (a year-only date gives ``birth_year`` and
  no ``birth_date``, so the 1 July convention of the canonical pipeline applies);
  ``gender`` female/male/other/unknown -> F/M/U/U; ``deceasedDateTime``; the id part of
  ``managingOrganization.reference`` as ``practice_id``. ``deceasedBoolean`` is not read: a
  patient known to be dead without a date has no death date and is followed as alive.
- ``Encounter`` -> ``encounters``: ``subject``, ``period.start``, ``class.code`` lower-cased.
- ``Condition`` -> ``diagnoses``: one row per distinct ICD-10 or ICD-9-CM coding (chosen by
  system URI or OID, :data:`ICD_SYSTEMS`; other codings such as SNOMED CT are ignored). A
  Condition with no such coding still gives one row, carrying its first coding's system URI
  and code (or NULLs when it has none), so the quality log counts it as an unknown code
  system instead of losing it. The date is ``onsetDateTime``, else ``onsetPeriod.start``, else
  ``recordedDate``; ``source`` is ``problem_list`` when a category is ``problem-list-item``,
  else ``visit``.
- ``MedicationRequest`` and ``MedicationStatement`` -> ``prescriptions``: the medication is
  ``medicationCodeableConcept``, else what ``medicationReference`` points at: a contained
  Medication (``#id``) or one in the ``Medication`` files (its ``code``). One row per distinct
  ATC coding (one row with no ``atc`` when there is none, set aside as an unknown code system;
  ``medication not found`` when the reference leads nowhere). ``drug_text`` is the
  medication's text, else its first coding's display, else (no ATC) its first coding as
  ``system|code``, else the reference. Rows the reader sets aside are never exact
  duplicates, so two drugs without ATC on one day stay two rows.
  Requests start at ``authoredOn`` and stop at the first dosage instruction's
  ``timing.repeat.boundsPeriod.end``, else ``dispenseRequest.validityPeriod.end``; statements
  use ``effectiveDateTime`` or ``effectivePeriod``. A stop before the start is set aside.
- ``Observation`` -> ``measurements``: one row per distinct measure its LOINC codings map to
  (:data:`LOINC_MEASURES`); each ``component`` entry (a blood pressure panel) gives its own
  row, and so does the observation's own value when it has one beside its components. Unmapped
  LOINC codes give ``measure`` = ``loinc:<code>`` (counted as an unknown measure).
  ``valueQuantity`` gives ``value`` and ``unit`` (the UCUM code when the system is UCUM, else
  the printed unit); ``valueInteger`` gives ``value``; a comparator (``<``, ``>=``...) is kept
  by writing the value as text, e.g. ``>90``; ``valueString`` and the text of
  ``valueCodeableConcept`` (else its first coding's display), lower-cased, give
  ``value_text``, except SNOMED CT smoking status codes (:data:`SNOMED_SMOKING`), which give
  the category. The date is ``effectiveDateTime``, else ``effectivePeriod.start``, else
  ``effectiveInstant``, else ``issued`` (when the observation was reported).

Dates keep the date part as written (no time-zone shift). A year-month date takes the 15th.
An event dated with a year only is set aside (``year-only date``), one with no date at all as
``missing date``; a death date of a year only takes 1 July, as the canonical pipeline does for
a birth year. A row whose subject is missing or no Patient is ``no patient reference``.
Statuses set aside are :data:`STATUS_SET_ASIDE`; every other status (a ``provisional``,
``differential`` or ``unconfirmed`` diagnosis, a ``draft`` or ``stopped`` request, an
``intended`` statement, a ``preliminary`` observation) is used.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path

from sqlglot import exp

from pipeline.extract._table import ExtractTable
from pipeline.extract.readers.fhir._codes import (
    ATC_SYSTEM,
    ICD_SYSTEMS,
    LOINC_MEASURES,
    LOINC_SYSTEM,
    SNOMED_SMOKING,
    SNOMED_SYSTEM,
    STATUS_SET_ASIDE,
    UCUM_SYSTEM,
)
from pipeline.extract.readers.fhir._read import READ_COLUMNS, fill, lookup, resources, strings

log = logging.getLogger(__name__)


Files = Mapping[str, Sequence[tuple[int, Path]]]


def _status(resource_type: str, status: exp.Expression) -> exp.Expression:
    return lookup(status, STATUS_SET_ASIDE[resource_type])


def _read(files: Files, resource_type: str) -> exp.Expression:
    return resources(resource_type, files.get(resource_type, ()))


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
  FHIR_DATE(deceasedDateTime, TRUE) AS death_date,
  REF_ID(json_extract_string(managingOrganization, '$.reference'), 'Organization')
    AS practice_id,
  source_position,
  line_problem AS source_problem
FROM :patient
"""


def fhir_patients(files: Files) -> exp.Select:
    """``patients`` from Patient resources."""
    return fill(_PATIENTS, year=exp.Literal.string("^[0-9]{4}$"), patient=_read(files, "Patient"))


# The reader's problems, first that applies: the line, the subject, the status, the date.
_PROBLEM = """
COALESCE(
  line_problem,
  CASE WHEN patient_id IS NULL THEN 'no patient reference' END,
  status_problem,
  DATE_PROBLEM(date_text)
)
"""

_ENCOUNTERS = """
SELECT
  patient_id,
  FHIR_DATE(date_text) AS encounter_date,
  encounter_type,
  source_position,
  :problem AS source_problem
FROM (
  SELECT
    REF_ID(json_extract_string(subject, '$.reference'), 'Patient') AS patient_id,
    json_extract_string(period, '$.start') AS date_text,
    LOWER(json_extract_string("class", '$.code')) AS encounter_type,
    :status AS status_problem,
    line_problem,
    source_position
  FROM :encounter
) AS e
"""


def _problem() -> exp.Expression:
    return fill(f"SELECT {_PROBLEM}").expressions[0]


def fhir_encounters(files: Files) -> exp.Select:
    """``encounters`` from Encounter resources."""
    return fill(
        _ENCOUNTERS,
        problem=_problem(),
        status=_status("Encounter", exp.column("status")),
        encounter=_read(files, "Encounter"),
    )


_DIAGNOSES = """
SELECT
  patient_id, event_date, coding.code_system AS code_system, coding.code AS code, source,
  source_position, source_problem
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
    ) AS coding,
    source_position,
    :problem AS source_problem
  FROM (
    SELECT
      REF_ID(json_extract_string(subject, '$.reference'), 'Patient') AS patient_id,
      COALESCE(onsetDateTime, json_extract_string(onsetPeriod, '$.start'), recordedDate)
        AS date_text,
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
      ) AS usable,
      CASE
        WHEN LIST_CONTAINS(json_extract_string(verificationStatus, '$.coding[*].code'),
          'entered-in-error') THEN 'entered in error'
        WHEN LIST_CONTAINS(json_extract_string(verificationStatus, '$.coding[*].code'),
          'refuted') THEN 'refuted'
      END AS status_problem,
      line_problem,
      source_position
    FROM :condition
  ) AS conditions
) AS flat
"""


def fhir_diagnoses(files: Files) -> exp.Select:
    """``diagnoses`` from Condition resources: one row per distinct ICD coding."""
    system = exp.func("json_extract_string", exp.column("c"), exp.Literal.string("$.system"))
    return fill(
        _DIAGNOSES,
        problem=_problem(),
        label=lookup(system, ICD_SYSTEMS),
        systems=strings(list(ICD_SYSTEMS)),
        condition=_read(files, "Condition"),
    )


_PRESCRIPTIONS = """
SELECT
  patient_id, start_date, stop_date, atc, drug_text, source_position,
  COALESCE(
    :problem,
    CASE
      WHEN TRY_CAST(stop_date AS DATE) < TRY_CAST(start_date AS DATE)
        THEN 'stop date before start date'
    END,
    CASE
      WHEN not_found THEN 'medication not found'
      WHEN atc IS NULL THEN 'unknown code system'
    END
  ) AS source_problem
FROM (
  SELECT
    patient_id,
    date_text,
    FHIR_DATE(date_text) AS start_date,
    FHIR_DATE(stop_text) AS stop_date,
    UNNEST(CASE WHEN LEN(usable) > 0 THEN usable ELSE [NULL] END) AS atc,
    COALESCE(
      json_extract_string(medication, '$.text'),
      json_extract_string(medication, '$.coding[0].display'),
      CASE WHEN LEN(usable) = 0 THEN
        json_extract_string(medication, '$.coding[0].system') || '|'
          || json_extract_string(medication, '$.coding[0].code')
      END,
      reference
    ) AS drug_text,
    not_found,
    status_problem,
    line_problem,
    source_position
  FROM (
    SELECT
      *,
      ARRAY(
        SELECT DISTINCT json_extract_string(c, '$.code')
        FROM (SELECT UNNEST(json_extract(medication, '$.coding[*]')) AS c) AS codings
        WHERE json_extract_string(c, '$.system') = :atc_system
      ) AS usable
    FROM (
      SELECT
        m.*,
        COALESCE(m.concept, m.contained_code, d.code) AS medication,
        m.concept IS NULL AND m.reference IS NOT NULL AND m.contained_code IS NULL
          AND d.code IS NULL AS not_found
      FROM (
        SELECT
          *,
          CASE WHEN STARTS_WITH(reference, '#') THEN
            ARRAY(
              SELECT json_extract(c, '$.code')
              FROM (SELECT UNNEST(json_extract(contained, '$[*]')) AS c) AS inside
              WHERE json_extract_string(c, '$.resourceType') = 'Medication'
                AND '#' || json_extract_string(c, '$.id') = reference
            )[1]
          END AS contained_code
        FROM (
          SELECT
            REF_ID(json_extract_string(subject, '$.reference'), 'Patient') AS patient_id,
            authoredOn AS date_text,
            COALESCE(
              json_extract_string(dosageInstruction, '$[0].timing.repeat.boundsPeriod.end'),
              json_extract_string(dispenseRequest, '$.validityPeriod.end')
            ) AS stop_text,
            medicationCodeableConcept AS concept,
            json_extract_string(medicationReference, '$.reference') AS reference,
            contained,
            :request_status AS status_problem,
            line_problem,
            source_position
          FROM :request
          UNION ALL
          SELECT
            REF_ID(json_extract_string(subject, '$.reference'), 'Patient') AS patient_id,
            COALESCE(effectiveDateTime, json_extract_string(effectivePeriod, '$.start'))
              AS date_text,
            json_extract_string(effectivePeriod, '$.end') AS stop_text,
            medicationCodeableConcept AS concept,
            json_extract_string(medicationReference, '$.reference') AS reference,
            contained,
            :statement_status AS status_problem,
            line_problem,
            source_position
          FROM :statement
        ) AS both_kinds
      ) AS m
      LEFT JOIN (
        SELECT id, ARG_MIN(code, source_position) AS code
        FROM :medication
        WHERE line_problem IS NULL AND id IS NOT NULL
        GROUP BY id
      ) AS d ON d.id = REF_ID(m.reference, 'Medication')
    ) AS resolved
  ) AS coded
) AS flat
"""


def fhir_prescriptions(files: Files) -> exp.Select:
    """``prescriptions`` from MedicationRequest and MedicationStatement resources."""
    return fill(
        _PRESCRIPTIONS,
        problem=_problem(),
        atc_system=exp.Literal.string(ATC_SYSTEM),
        request_status=_status("MedicationRequest", exp.column("status")),
        statement_status=_status("MedicationStatement", exp.column("status")),
        request=_read(files, "MedicationRequest"),
        statement=_read(files, "MedicationStatement"),
        medication=_read(files, "Medication"),
    )


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


def fhir_measurements(files: Files) -> exp.Select:
    """``measurements`` from Observation resources (their own value and their components)."""
    code = exp.func("json_extract_string", exp.column("c"), exp.Literal.string("$.code"))
    observations = fill(
        _OBSERVATIONS,
        problem=_problem(),
        status=_status("Observation", exp.column("status")),
        observation=_read(files, "Observation"),
    )
    select = fill(
        _MEASUREMENTS,
        ucum=exp.Literal.string(UCUM_SYSTEM),
        loinc_system=exp.Literal.string(LOINC_SYSTEM),
        snomed=exp.Literal.string(SNOMED_SYSTEM),
        measure=lookup(code, LOINC_MEASURES),
        smoking=lookup(code.copy(), SNOMED_SMOKING),
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
    """The canonical rows of one table of a FHIR export, as a SELECT over its NDJSON files.

    Besides the canonical columns it gives ``source_position`` (the file's index in
    ``table.files`` * POSITION_BASE + the line) and ``source_problem``.
    """
    files: dict[str, list[tuple[int, Path]]] = {}
    for index, (path, resource_type) in enumerate(zip(table.files, table.resources, strict=True)):
        files.setdefault(resource_type, []).append((index, path))
    for resource_type in sorted(set(READ_COLUMNS) - set(files)):
        log.debug("no %s files for table %s", resource_type, table.name)
    return BUILDERS[table.name](files)
