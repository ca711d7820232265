"""Write a canonical extract as a FHIR R4 bulk-data export (NDJSON), for the FHIR reader.

:func:`write_fhir_export` turns the five canonical tables (a folder of Parquet or CSV files, or
a site mapping file) into ``Patient.ndjson``, ``Encounter.ndjson``, ``Condition.ndjson``,
``MedicationRequest.ndjson`` and ``Observation.ndjson`` (with a seed also
``MedicationStatement.ndjson`` and ``Medication.ndjson``), shaped so that
:mod:`pipeline.engine._fhir` reads back the same canonical rows, and so the same cohort. It
exists to test that reader at scale and to give the demo study a FHIR copy of its extract.

The row writers live in :mod:`pipeline.synth._fhir_resources`. Without a seed each row is
written in the one plain form below; with a seed (``generate_extract(file_format="fhir")`` passes
its own) :mod:`pipeline.synth._fhir_server` varies the forms as a server would and adds extra
resources the reader sets aside, while the rows read back, and so the cohort, stay the same
(converted units give back the same canonical values, not the same text).

How each canonical row is written without a seed (one resource per row, exact duplicates
included):

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
import os
import tempfile
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import TextIO

import duckdb
from sqlglot import exp

from pipeline.compile._sources import DIAGNOSES, ENCOUNTERS, MEASUREMENTS, PATIENTS, PRESCRIPTIONS
from pipeline.engine._fhir import fhir_source
from pipeline.engine._mapped import source_column
from pipeline.engine.duckdb import table_reader
from pipeline.extract import ExtractTable, discover_extract
from pipeline.synth._fhir_resources import WRITERS, Resource, Row
from pipeline.synth._fhir_server import ServerLook

# The files of an export, in the order they are returned (bulk data names files by type).
FILE_ORDER = (
    "Patient",
    "Encounter",
    "Condition",
    "MedicationRequest",
    "MedicationStatement",
    "Medication",
    "Observation",
)
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


def _source_sql(table: ExtractTable, columns: tuple[str, ...]) -> str:
    """SQL reading one canonical table with exactly ``columns`` (NULL for absent ones)."""
    rows: exp.Expression
    if table.file_format == "fhir":
        rows = fhir_source(table).subquery("src")
    else:
        rows = exp.Table(
            this=table_reader(table), alias=exp.TableAlias(this=exp.to_identifier("src"))
        )
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


@dataclass(frozen=True)
class FhirExport:
    """What :func:`write_fhir_export` wrote.

    Attributes:
        files: The NDJSON files, in :data:`FILE_ORDER`.
        set_aside: Extra resources written for the reader to set aside, per (canonical table,
            the reader's reason); empty without a seed.
        forms: Rows written in each varied form (see :mod:`pipeline.synth._fhir_server`).
    """

    files: tuple[Path, ...]
    set_aside: dict[tuple[str, str], int]
    forms: dict[str, int]


def _plain(table: str, rows: Iterable[Row]) -> Iterator[tuple[str, Resource]]:
    resource_type, write = WRITERS[table]
    for number, row in enumerate(rows, start=1):
        yield resource_type, write(row, number)


def _line(resource: Resource) -> str:
    return json.dumps(resource, ensure_ascii=False, separators=(",", ":"), allow_nan=False) + "\n"


class _Parts:
    """One part file per resource type, opened on first use, moved in place when complete."""

    def __init__(self, out_dir: Path) -> None:
        self.out_dir = out_dir
        self.handles: dict[str, TextIO] = {}

    def write(self, resource_type: str, resource: Resource) -> None:
        if resource_type not in self.handles:
            part = self.out_dir / f".{resource_type}.ndjson.part"
            self.handles[resource_type] = part.open("w", encoding="utf-8", newline="\n")
        self.handles[resource_type].write(_line(resource))

    def install(self) -> list[Path]:
        """Move every part file in (an empty Patient.ndjson too) and drop stale files."""
        self.close()
        if "Patient" not in self.handles:
            (self.out_dir / ".Patient.ndjson.part").write_text("", encoding="utf-8")
        written = []
        for resource_type in FILE_ORDER:
            path = self.out_dir / f"{resource_type}.ndjson"
            if resource_type in self.handles or resource_type == "Patient":
                os.replace(self.out_dir / f".{resource_type}.ndjson.part", path)
                written.append(path)
            else:  # a type this export has none of: an older file would be read with it
                path.unlink(missing_ok=True)
        return written

    def close(self) -> None:
        for handle in self.handles.values():
            handle.close()

    def discard(self) -> None:
        """Remove the part files left by a failed export (none after :meth:`install`)."""
        self.close()
        for resource_type in FILE_ORDER:
            (self.out_dir / f".{resource_type}.ndjson.part").unlink(missing_ok=True)


def write_fhir_export(canonical_dir: Path, out_dir: Path, *, seed: int | None = None) -> FhirExport:
    """Write a canonical extract's five tables as a FHIR R4 bulk-data export.

    Args:
        canonical_dir: The extract: a folder of canonical Parquet or CSV tables (or anything
            ``ascertain build --extract`` accepts, e.g. a site mapping file).
        out_dir: Folder for the NDJSON files (created if needed; files of the names in
            :data:`FILE_ORDER` are replaced once all are complete, or removed when this export
            has no resource of their type).
        seed: None writes each row in one plain form, the exact twin of the extract. A seed
            writes it as a server would, in varied forms, with extra resources the reader sets
            aside (:mod:`pipeline.synth._fhir_server`); the canonical rows used are the same.

    Returns:
        A :class:`FhirExport`. A type without resources gives no file (bulk export writes
        none), except Patient, which the reader requires.

    Raises:
        ExtractError: A table is missing or unreadable.
    """
    sources = (PATIENTS, ENCOUNTERS, DIAGNOSES, PRESCRIPTIONS, MEASUREMENTS)
    tables = discover_extract(Path(canonical_dir), sources)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    look = None if seed is None else ServerLook(seed)
    parts = _Parts(out_dir)
    with tempfile.TemporaryDirectory(prefix="ascertain-fhir-") as scratch:
        con = _connect(Path(scratch))
        try:
            for name in WRITERS:
                rows = _rows(con, tables[name])
                stream = _plain(name, rows) if look is None else look.resources(name, rows)
                for resource_type, resource in stream:
                    parts.write(resource_type, resource)
            for medication in look.medications.values() if look is not None else ():
                parts.write("Medication", medication)
            files = parts.install()
        finally:
            con.close()
            parts.discard()
    if look is None:
        return FhirExport(tuple(files), {}, {})
    return FhirExport(
        tuple(files), dict(sorted(look.set_aside.items())), dict(sorted(look.forms.items()))
    )
