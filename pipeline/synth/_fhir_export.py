"""Write a canonical extract as a FHIR R4 bulk-data export (NDJSON), for the FHIR reader.

:func:`write_fhir_export` turns the five canonical tables (a folder of Parquet or CSV files, or
a site mapping file) into ``Patient.ndjson``, ``Encounter.ndjson``, ``Condition.ndjson``,
``MedicationRequest.ndjson`` and ``Observation.ndjson``, shaped so that
:mod:`pipeline.engine._fhir` reads back the same canonical rows, and so the same cohort. It
exists to test that reader at scale and to give the demo study a FHIR copy of its extract.

How each canonical row is written (one resource per row, exact duplicates included):

- ``patients`` -> Patient: ``id`` = patient_id; ``birthDate`` = birth_date, or the year alone
  (``1950``) when only birth_year is readable; ``gender`` from the sex code as the pipeline
  reads it (trimmed, upper case): F/M -> female/male, U -> unknown, any other code -> other,
  none -> no gender; ``deceasedDateTime``; ``managingOrganization`` = ``Organization/<practice>``.
- ``encounters`` -> Encounter (status ``unknown``): ``period.start``; ``class`` = the encounter
  type as a code of a local system (the reader reads the code, lower-cased).
- ``diagnoses`` -> Condition: one coding, ``http://hl7.org/fhir/sid/icd-10`` for ICD10 and
  ``http://hl7.org/fhir/sid/icd-9-cm`` for ICD9 (labels compared as the pipeline does), the
  code exactly as written (case, dots and spaces kept); ``onsetDateTime``; a category
  ``problem-list-item`` for problem_list, ``encounter-diagnosis`` for visit and billing, plus
  the source as written under a local system.
- ``prescriptions`` -> MedicationRequest (status ``unknown``, intent ``order``):
  ``authoredOn`` = start_date; stop_date as ``dosageInstruction[0].timing.repeat.boundsPeriod
  .end``; ``medicationCodeableConcept`` = the ATC code (``http://www.whocc.no/atc``) and
  drug_text as its text.
- ``measurements`` -> Observation (status ``final``): the measure as one LOINC code the reader
  maps back to it (creatinine in umol/L or mmol/L gets 14682-9, else 2160-0); ``loinc:<code>``
  measures as that LOINC code. A value is a ``valueQuantity`` whose ``unit`` is the unit text
  as written (with the UCUM system and code only when the text is itself the UCUM code, e.g.
  ``mg/dL``, not ``mmHg``). A value_text alone is a ``valueString``, except ``<0.6``/``>90``
  style text, which becomes a quantity with a ``comparator`` (the reader writes it back as
  the same text) so that its unit is kept.

Every date the pipeline can read (``TRY_CAST(... AS DATE)``) is written as ISO ``YYYY-MM-DD``.
Output is sorted (every table on all its columns) and resource ids other than Patient's are
numbered in that order, so the same input gives the same bytes. Tables are streamed through
DuckDB in record batches and written one JSON line at a time, so memory does not grow with the
extract (DuckDB sorts larger-than-memory tables on disk, in a scratch folder).

Not valid FHIR, written anyway so that the reader gives back the same canonical row: dates the
pipeline cannot read (``2015-13-04``, ``04/01/2015`` in CSV) are written as they are; a value
that is not a finite number (``abc``, ``inf``) is written as a JSON string in
``valueQuantity.value``; an unknown code-system label (``READ``) is written as the coding's
``system``; codes, ids and units are not checked against FHIR's formats.

What does not round-trip (the reader cannot express it; none of it changes the demo study):

- billing diagnoses come back with source ``visit``, as do those with any other source or
  none (the reader knows only problem-list-item); the local category coding keeps the
  original. A study selecting diagnoses by source ``billing`` or ``visit`` would differ.
- birth_year when birth_date is readable (the pipeline ignores it then); birth years outside
  0-9999; sex codes other than F/M/U come back as U; measure names come back lower-cased, and
  a measure the reader cannot map (not a known LOINC measure, not ``loinc:<code>``) comes back
  empty (both are set aside as an unknown measure).
- value_text beside a value comes back empty (kept in ``note``; the pipeline reads the text
  only when there is no value). A value_text with a unit that is not ``<0.6``-style comes
  back as one ``valueString`` holding both when the text is a plain number (``7,4`` and ``%``
  -> ``7,4 %``, which the pipeline reads as the same number and unit) and without its unit
  otherwise (``6.5 %`` keeps the unit in the text; coded values need none).
- unreadable dates that FHIR's partial-date rule would complete (``2015`` -> 2015-07-01,
  ``2015-03`` -> 2015-03-15, a date followed by other text -> the date).
- numbers come back as the reader prints them: the same double, but CSV text such as
  ``7.40`` or ``1e3`` reads back as ``7.4`` and ``1000.0``.
- patient and practice ids containing ``/`` (a reference holds the id after the last
  ``/``).
"""

from __future__ import annotations

import json
import math
import os
import re
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import duckdb
from sqlglot import exp

from pipeline.compile._measurements import READING_PATTERN
from pipeline.compile._sources import DIAGNOSES, ENCOUNTERS, MEASUREMENTS, PATIENTS, PRESCRIPTIONS
from pipeline.engine._duckdb import _reader
from pipeline.engine._fhir import (
    ATC_SYSTEM,
    LOINC_MEASURES,
    LOINC_SYSTEM,
    UCUM_SYSTEM,
    fhir_source,
)
from pipeline.engine._mapped import source_column
from pipeline.extract import ExtractTable, discover_extract

Resource = dict[str, Any]
Row = dict[str, Any]

ICD10_SYSTEM = "http://hl7.org/fhir/sid/icd-10"
ICD9_SYSTEM = "http://hl7.org/fhir/sid/icd-9-cm"
CATEGORY_SYSTEM = "http://terminology.hl7.org/CodeSystem/condition-category"
# Local code systems for what FHIR has no standard code for (URNs: nothing to resolve).
ENCOUNTER_TYPE_SYSTEM = "urn:ascertain:encounter-type"
DIAGNOSIS_SOURCE_SYSTEM = "urn:ascertain:diagnosis-source"
MEASURE_SYSTEM = "urn:ascertain:measure"
_ABSENT = {
    "extension": [
        {
            "url": "http://hl7.org/fhir/StructureDefinition/data-absent-reason",
            "valueCode": "unknown",
        }
    ]
}

# The LOINC code each measure is written with: the first the reader maps to it (reversed, so
# the first wins), except eGFR, written as CKD-EPI, the equation labs report.
MEASURE_LOINC: dict[str, str] = {
    **{measure: code for code, measure in reversed(LOINC_MEASURES.items())},
    "egfr": "62238-1",
}
_CREATININE_MOLAR = ("14682-9", ("umol/l", "µmol/l", "mmol/l"))

# Printed units that are also their UCUM code (so system + code can be given with no change).
UCUM_AS_PRINTED = frozenset(
    {"%", "cm", "m", "kg", "g", "kg/m2", "mg/dL", "mg/L", "g/dL", "g/L", "mmol/L", "umol/L",
     "mmol/mol", "mL/min"}
)  # fmt: skip

# Text the reader gives back unchanged from a quantity with a comparator: ``<`` + JSON number.
_COMPARATOR_TEXT = re.compile(r"^(<=|>=|<|>)(.+)$")
_PLAIN_NUMBER = re.compile(r"^-?(?:0|[1-9][0-9]*)(?:\.[0-9]+)?$")
# How the pipeline reads a value_text: qualifier, number, unit (group 4).
_READING = re.compile(READING_PATTERN)

_BATCH_ROWS = 50_000
_ISO_DAY = "'[0-9]{4}-[0-9]{2}-[0-9]{2}'"


def _date(column: str) -> str:
    """SQL: the date as ISO text when the pipeline can read it, else the text as written."""
    parsed = f"CAST(TRY_CAST({column} AS DATE) AS VARCHAR)"
    return (
        f"CASE WHEN REGEXP_FULL_MATCH({parsed}, {_ISO_DAY}) THEN {parsed} "
        f"ELSE NULLIF(TRIM(CAST({column} AS VARCHAR)), '') END"
    )


def _text(column: str) -> str:
    return f"CAST({column} AS VARCHAR)"


def _trimmed(column: str) -> str:
    return f"NULLIF(TRIM(CAST({column} AS VARCHAR)), '')"


# Per table: the canonical columns read, and the SELECT list over them (in sort order).
_SELECTS: dict[str, tuple[tuple[str, ...], str]] = {
    "patients": (
        ("patient_id", "birth_date", "birth_year", "sex", "death_date", "practice_id"),
        f"""{_text("patient_id")} AS patient_id,
        {_date("birth_date")} AS birth_date,
        TRY_CAST(birth_date AS DATE) IS NOT NULL AS birth_readable,
        TRY_CAST(birth_year AS INT) AS birth_year,
        NULLIF(UPPER(TRIM(CAST(sex AS VARCHAR))), '') AS sex,
        {_date("death_date")} AS death_date,
        {_trimmed("practice_id")} AS practice_id""",
    ),
    "encounters": (
        ("patient_id", "encounter_date", "encounter_type"),
        f"""{_text("patient_id")} AS patient_id,
        {_date("encounter_date")} AS encounter_date,
        {_trimmed("encounter_type")} AS encounter_type""",
    ),
    "diagnoses": (
        ("patient_id", "event_date", "code_system", "code", "source"),
        f"""{_text("patient_id")} AS patient_id,
        {_date("event_date")} AS event_date,
        {_text("code_system")} AS code_system,
        UPPER(TRIM(CAST(code_system AS VARCHAR))) AS system_label,
        {_text("code")} AS code,
        {_text("source")} AS source,
        LOWER(TRIM(CAST(source AS VARCHAR))) AS source_key""",
    ),
    "prescriptions": (
        ("patient_id", "start_date", "stop_date", "atc", "drug_text"),
        f"""{_text("patient_id")} AS patient_id,
        {_date("start_date")} AS start_date,
        {_date("stop_date")} AS stop_date,
        {_text("atc")} AS atc,
        {_text("drug_text")} AS drug_text""",
    ),
    "measurements": (
        ("patient_id", "obs_date", "measure", "value", "value_text", "unit"),
        f"""{_text("patient_id")} AS patient_id,
        {_date("obs_date")} AS obs_date,
        {_text("measure")} AS measure,
        LOWER(TRIM(CAST(measure AS VARCHAR))) AS measure_key,
        TRY_CAST(value AS DOUBLE) AS value_number,
        {_trimmed("value")} AS value,
        {_text("value_text")} AS value_text,
        {_trimmed("unit")} AS unit""",
    ),
}


def _subject(patient_id: str | None) -> Resource:
    return {"reference": f"Patient/{patient_id}"} if patient_id is not None else dict(_ABSENT)


def _patient(row: Row, _: int) -> Resource:
    resource: Resource = {"resourceType": "Patient"}
    if row["patient_id"] is not None:
        resource["id"] = row["patient_id"]
    sex = row["sex"]
    if sex is not None:
        resource["gender"] = {"F": "female", "M": "male", "U": "unknown"}.get(sex, "other")
    year = row["birth_year"]
    if row["birth_readable"] or (row["birth_date"] is not None and year is None):
        resource["birthDate"] = row["birth_date"]
    elif year is not None:
        resource["birthDate"] = f"{year:04d}" if 0 <= year <= 9999 else str(year)
    if row["death_date"] is not None:
        resource["deceasedDateTime"] = row["death_date"]
    if row["practice_id"] is not None:
        resource["managingOrganization"] = {"reference": f"Organization/{row['practice_id']}"}
    return resource


def _encounter(row: Row, number: int) -> Resource:
    kind = row["encounter_type"]
    resource: Resource = {
        "resourceType": "Encounter",
        "id": f"enc-{number}",
        "status": "unknown",
        "class": {"system": ENCOUNTER_TYPE_SYSTEM, "code": kind} if kind else dict(_ABSENT),
        "subject": _subject(row["patient_id"]),
    }
    if row["encounter_date"] is not None:
        resource["period"] = {"start": row["encounter_date"]}
    return resource


def _condition(row: Row, number: int) -> Resource:
    resource: Resource = {"resourceType": "Condition", "id": f"cond-{number}"}
    key = row["source_key"]
    if key is not None:
        codings = [{"system": DIAGNOSIS_SOURCE_SYSTEM, "code": row["source"]}]
        if key in ("problem_list", "visit", "billing"):
            hl7 = "problem-list-item" if key == "problem_list" else "encounter-diagnosis"
            codings.insert(0, {"system": CATEGORY_SYSTEM, "code": hl7})
        resource["category"] = [{"coding": codings}]
    system = {"ICD10": ICD10_SYSTEM, "ICD9": ICD9_SYSTEM}.get(
        row["system_label"], row["code_system"]
    )
    coding = {"system": system, "code": row["code"]}
    coding = {k: v for k, v in coding.items() if v is not None}
    if coding:
        resource["code"] = {"coding": [coding]}
    resource["subject"] = _subject(row["patient_id"])
    if row["event_date"] is not None:
        resource["onsetDateTime"] = row["event_date"]
    return resource


def _medication_request(row: Row, number: int) -> Resource:
    medication: Resource = {}
    if row["atc"] is not None:
        medication["coding"] = [{"system": ATC_SYSTEM, "code": row["atc"]}]
    if row["drug_text"] is not None:
        medication["text"] = row["drug_text"]
    resource: Resource = {
        "resourceType": "MedicationRequest",
        "id": f"rx-{number}",
        "status": "unknown",
        "intent": "order",
        "medicationCodeableConcept": medication or dict(_ABSENT),
        "subject": _subject(row["patient_id"]),
    }
    if row["start_date"] is not None:
        resource["authoredOn"] = row["start_date"]
    if row["stop_date"] is not None:
        resource["dosageInstruction"] = [
            {"timing": {"repeat": {"boundsPeriod": {"end": row["stop_date"]}}}}
        ]
    return resource


def _observation_code(measure: str | None, key: str | None, unit: str | None) -> Resource:
    if key is None or measure is None:
        return dict(_ABSENT)
    if key == "creatinine" and unit is not None and unit.lower() in _CREATININE_MOLAR[1]:
        loinc: str | None = _CREATININE_MOLAR[0]
    elif key.startswith("loinc:") and key[6:]:
        loinc = measure.strip()[6:]
    else:
        loinc = MEASURE_LOINC.get(key)
    if loinc is None:
        return {"coding": [{"system": MEASURE_SYSTEM, "code": measure}], "text": measure}
    return {"coding": [{"system": LOINC_SYSTEM, "code": loinc}], "text": measure}


def _quantity(value: float | str | None, unit: str | None) -> Resource:
    quantity: Resource = {} if value is None else {"value": value}
    if unit is not None:
        quantity["unit"] = unit
        if unit in UCUM_AS_PRINTED:
            quantity.update(system=UCUM_SYSTEM, code=unit)
    return quantity


def _literal(text: str) -> int | float | None:
    """The JSON number written exactly as ``text`` (which the reader gives back), if any."""
    if not _PLAIN_NUMBER.match(text) or len(text) > 15:
        return None
    number = float(text) if "." in text else int(text)
    return number if json.dumps(number) == text else None


def _observation_value(row: Row) -> Resource:
    """The value[x] (and note) of one measurement row."""
    unit, text = row["unit"], row["value_text"]
    if row["value"] is not None:
        number = row["value_number"]
        value: float | str = row["value"]
        if number is not None and math.isfinite(number):
            literal = _literal(row["value"])
            value = number if literal is None else literal
        fields: Resource = {"valueQuantity": _quantity(value, unit)}
        if text is not None:
            fields["note"] = [{"text": text}]
        return fields
    if text is None:
        return {"valueQuantity": _quantity(None, unit)} if unit is not None else {}
    comparator = _COMPARATOR_TEXT.match(text)
    bound = _literal(comparator[2]) if comparator else None
    if comparator and bound is not None:
        return {"valueQuantity": {"comparator": comparator[1], **_quantity(bound, unit)}}
    reading = _READING.match(text.strip())
    if unit is not None and reading and not reading[4].strip():
        return {"valueString": f"{text.strip()} {unit}"}
    return {"valueString": text}


def _observation(row: Row, number: int) -> Resource:
    return {
        "resourceType": "Observation",
        "id": f"obs-{number}",
        "status": "final",
        "code": _observation_code(row["measure"], row["measure_key"], row["unit"]),
        "subject": _subject(row["patient_id"]),
        **({"effectiveDateTime": row["obs_date"]} if row["obs_date"] is not None else {}),
        **_observation_value(row),
    }


# Canonical table -> (resource type, the resource written for each row).
WRITERS: dict[str, tuple[str, Callable[[Row, int], Resource]]] = {
    "patients": ("Patient", _patient),
    "encounters": ("Encounter", _encounter),
    "diagnoses": ("Condition", _condition),
    "prescriptions": ("MedicationRequest", _medication_request),
    "measurements": ("Observation", _observation),
}


def _source_sql(table: ExtractTable, columns: tuple[str, ...]) -> str:
    """SQL reading one canonical table with exactly ``columns`` (NULL for absent ones)."""
    rows: exp.Expression
    if table.file_format == "fhir":
        rows = fhir_source(table).subquery("src")
    else:
        rows = exp.Table(this=_reader(table), alias=exp.TableAlias(this=exp.to_identifier("src")))
    select = exp.select(
        *(
            source_column(table, c).as_(c)
            if c in table.provides
            else exp.cast(exp.null(), "VARCHAR").as_(c)
            for c in columns
        )
    ).from_(rows)
    return select.sql("duckdb")


def _rows(con: duckdb.DuckDBPyConnection, table: ExtractTable) -> Iterator[Row]:
    columns, select = _SELECTS[table.name]
    sql = f"SELECT {select} FROM ({_source_sql(table, columns)}) AS t ORDER BY ALL NULLS FIRST"
    reader = con.sql(sql).to_arrow_reader(_BATCH_ROWS)
    for batch in reader:
        yield from batch.to_pylist()


def _connect(scratch: Path) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect(":memory:")
    con.execute("SET temp_directory = ?", [str(scratch)])
    con.execute("SET enable_progress_bar = false")
    # As in the engine: every CSV value must reach our TRY_CAST, not a strict pushed-down cast.
    names = {row[0] for row in con.execute("SELECT name FROM duckdb_optimizers()").fetchall()}
    if "type_pushdown" in names:
        con.execute("SET disabled_optimizers = 'type_pushdown'")
    return con


def write_fhir_export(canonical_dir: Path, out_dir: Path) -> list[Path]:
    """Write a canonical extract's five tables as a FHIR R4 bulk-data export.

    Args:
        canonical_dir: The extract: a folder of canonical Parquet or CSV tables (or anything
            ``ascertain build --extract`` accepts, e.g. a site mapping file).
        out_dir: Folder for the NDJSON files (created if needed; files of the same names are
            replaced, each only once complete).

    Returns:
        The files written, in table order. A table without rows gives no file (bulk export
        writes none), except Patient, which the reader requires.

    Raises:
        ExtractError: A table is missing or unreadable.
    """
    sources = (PATIENTS, ENCOUNTERS, DIAGNOSES, PRESCRIPTIONS, MEASUREMENTS)
    tables = discover_extract(Path(canonical_dir), sources)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    written: list[Path] = []
    with tempfile.TemporaryDirectory(prefix="ascertain-fhir-") as scratch:
        con = _connect(Path(scratch))
        try:
            for name, (resource_type, write) in WRITERS.items():
                path = out_dir / f"{resource_type}.ndjson"
                part = out_dir / f".{resource_type}.ndjson.part"
                count = 0
                with part.open("w", encoding="utf-8", newline="\n") as handle:
                    for count, row in enumerate(_rows(con, tables[name]), start=1):
                        resource = write(row, count)
                        line = json.dumps(
                            resource, ensure_ascii=False, separators=(",", ":"), allow_nan=False
                        )
                        handle.write(line + "\n")
                if count == 0 and resource_type != "Patient":
                    part.unlink()
                    path.unlink(missing_ok=True)
                    continue
                os.replace(part, path)
                written.append(path)
        finally:
            con.close()
    return written
