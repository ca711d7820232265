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
- ``Condition`` -> ``diagnoses``: the reader knows ICD-10 and ICD-9-CM codings (by system
  URI or OID, :data:`ICD_SYSTEMS`) and SNOMED CT (:data:`SNOMED_SYSTEM`, code system
  ``SNOMED``). A Condition gives one row per distinct coding in a system the study's
  diagnosis evidence reads (the plan's ``SourceTable.code_systems``; ICD-10 and ICD-9 when
  the plan names none). A Condition coded in ICD-10 and SNOMED CT is one clinical fact
  written twice: a study reading one of the systems sees it once, so a rule counting rows
  does not count it twice; a study reading both gets a row per system, one for each of its
  lists (evidence listing both systems then counts such a Condition twice unless it counts
  ``distinct_days``). A Condition with no coding the study reads gives one row per known
  coding (used, matching nothing, as a CSV row of another code would), and one with no
  known coding gives one row carrying its first coding's system URI and code (or NULLs when
  it has none), so the quality log counts it as an unknown code system instead of losing
  it. The date is ``onsetDateTime``, else ``onsetPeriod.start``, else
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
- ``Observation`` -> ``measurements``: one row per distinct measure its LOINC codings map to:
  the LOINC codes of the study's measure files, shipped and its own (the plan's
  ``SourceTable.measure_codes``), else the reader's own :data:`LOINC_MEASURES` (the same
  codes as the shipped measure files; used by the synthetic writer); each ``component``
  entry (a blood pressure panel) gives its own row, and so does the observation's own value
  when it has one beside its components. Unmapped LOINC codes give ``measure`` =
  ``loinc:<code>`` (counted as an unknown measure).
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
from collections.abc import Callable
from pathlib import Path
from typing import Protocol

from sqlglot import exp

from pipeline.extract._table import ExtractTable
from pipeline.extract.readers.fhir._codes import ATC_SYSTEM, ICD_SYSTEMS, SNOMED_SYSTEM
from pipeline.extract.readers.fhir._observations import fhir_measurements
from pipeline.extract.readers.fhir._read import (
    READ_COLUMNS,
    Files,
    fill,
    lookup,
    read_type,
    row_problem,
    status_problem,
    strings,
)
from pipeline.extract.schema import SourceTable

log = logging.getLogger(__name__)


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
    return fill(
        _PATIENTS, year=exp.Literal.string("^[0-9]{4}$"), patient=read_type(files, "Patient")
    )


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


def fhir_encounters(files: Files) -> exp.Select:
    """``encounters`` from Encounter resources."""
    return fill(
        _ENCOUNTERS,
        problem=row_problem(),
        status=status_problem("Encounter", exp.column("status")),
        encounter=read_type(files, "Encounter"),
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
      CASE WHEN LEN(usable) > 0 THEN usable WHEN LEN(known) > 0 THEN known
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
        WHERE json_extract_string(c, '$.system') IN :read_systems
      ) AS usable,
      ARRAY(
        SELECT DISTINCT {'code_system': :label, 'code': json_extract_string(c, '$.code')}
        FROM (SELECT UNNEST(json_extract(code, '$.coding[*]')) AS c) AS codings
        WHERE json_extract_string(c, '$.system') IN :known_systems
      ) AS known,
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


# The diagnosis codings the reader knows: system URI or OID -> the pipeline's code system.
DIAGNOSIS_SYSTEMS = {**ICD_SYSTEMS, SNOMED_SYSTEM: "SNOMED"}
# What a plan without code systems reads (the reader's behaviour before SNOMED CT was read).
DEFAULT_READ = ("ICD10", "ICD9")


def fhir_diagnoses(files: Files, source: SourceTable | None = None) -> exp.Select:
    """``diagnoses`` from Condition resources: a row per coding in the systems the study reads."""
    wanted = (source.code_systems if source is not None else ()) or DEFAULT_READ
    read = [uri for uri, label in DIAGNOSIS_SYSTEMS.items() if label in wanted]
    system = exp.func("json_extract_string", exp.column("c"), exp.Literal.string("$.system"))
    return fill(
        _DIAGNOSES,
        problem=row_problem(),
        label=lookup(system, DIAGNOSIS_SYSTEMS),
        # An empty IN list does not parse: a study reading none of the reader's systems (only
        # Read v2, say) names a system no coding has.
        read_systems=strings(read or [""]),
        known_systems=strings(list(DIAGNOSIS_SYSTEMS)),
        condition=read_type(files, "Condition"),
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
        problem=row_problem(),
        atc_system=exp.Literal.string(ATC_SYSTEM),
        request_status=status_problem("MedicationRequest", exp.column("status")),
        statement_status=status_problem("MedicationStatement", exp.column("status")),
        request=read_type(files, "MedicationRequest"),
        statement=read_type(files, "MedicationStatement"),
        medication=read_type(files, "Medication"),
    )


class Builder(Protocol):
    """Builds one table's SELECT from the export's files and the table as the plan reads it."""

    def __call__(self, files: Files, source: SourceTable | None = None) -> exp.Select: ...


def _only_files(build: Callable[[Files], exp.Select]) -> Builder:
    """A builder that needs nothing of the plan's source table."""

    def builder(files: Files, source: SourceTable | None = None) -> exp.Select:
        del source  # the same rows whatever the study reads
        return build(files)

    return builder


BUILDERS: dict[str, Builder] = {
    "patients": _only_files(fhir_patients),
    "encounters": _only_files(fhir_encounters),
    "diagnoses": fhir_diagnoses,
    "prescriptions": _only_files(fhir_prescriptions),
    "measurements": fhir_measurements,
}


def fhir_source(table: ExtractTable, source: SourceTable | None = None) -> exp.Select:
    """The canonical rows of one table of a FHIR export, as a SELECT over its NDJSON files.

    Besides the canonical columns it gives ``source_position`` (the file's index in
    ``table.files`` * POSITION_BASE + the line) and ``source_problem``. ``source`` is the
    table as the plan reads it (the code systems and LOINC codes of the study); without it
    the reader reads ICD codings and its own LOINC table.
    """
    files: dict[str, list[tuple[int, Path]]] = {}
    for index, (path, resource_type) in enumerate(zip(table.files, table.resources, strict=True)):
        files.setdefault(resource_type, []).append((index, path))
    for resource_type in sorted(set(READ_COLUMNS) - set(files)):
        log.debug("no %s files for table %s", resource_type, table.name)
    return BUILDERS[table.name](files, source)
