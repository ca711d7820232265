"""Which files of a FHIR R4 bulk-data export hold which canonical table (names only)."""

from __future__ import annotations

import re

from pipeline.errors import ExtractError
from pipeline.extract._table import ExtractPath, ExtractTable
from pipeline.extract.readers.csv_parquet import open_bytes
from pipeline.extract.schema import CANONICAL_TABLES, SourceTable

# FHIR R4 bulk data: the resource types read for each canonical table.
FHIR_RESOURCES: dict[str, tuple[str, ...]] = {
    "patients": ("Patient",),
    "encounters": ("Encounter",),
    "diagnoses": ("Condition",),
    # Medication resources give no rows: medicationReference is followed to them.
    "prescriptions": ("Medication", "MedicationRequest", "MedicationStatement"),
    "measurements": ("Observation",),
}
# Canonical columns no FHIR resource read here carries (registration is not in Patient).
_NOT_IN_FHIR = frozenset({"registration_date", "deregistration_date"})
FHIR_COLUMNS: dict[str, tuple[str, ...]] = {
    t.name: tuple(c for c in t.column_names if c not in _NOT_IN_FHIR) for t in CANONICAL_TABLES
}
"""The canonical columns the reader derives for each table, in canonical order."""

NDJSON = (".ndjson", ".ndjson.gz")
# Bulk-data file names: Patient.ndjson, Patient.2.ndjson, Patient_001.ndjson, 1.Patient.ndjson.
_FHIR_NAME = re.compile(r"^(?:[0-9]+[._-])?([A-Z][A-Za-z]+)(?:[._-].*)?$")


def ndjson_files(folder: ExtractPath) -> list[ExtractPath]:
    """The NDJSON files of a folder, sorted (any at all make it a FHIR export)."""
    return sorted(p for p in folder.iterdir() if p.is_file() and p.name.endswith(NDJSON))


def _fhir_type(path: ExtractPath) -> str | None:
    stem = path.name.removesuffix(".gz").removesuffix(".ndjson")
    match = _FHIR_NAME.match(stem)
    return match.group(1) if match else None


def _has_resources(path: ExtractPath) -> bool:
    """Whether an NDJSON file holds anything but blank space (read up to its first byte)."""
    try:
        with open_bytes(path) as handle:
            while chunk := handle.read(1 << 16):
                if chunk.strip(b" \t\r\n\xef\xbb\xbf"):
                    return True
    except (OSError, EOFError) as err:
        raise ExtractError(
            f"cannot be read: {err}", code="unreadable-file", where=str(path)
        ) from err
    return False


def discover_fhir(
    folder: ExtractPath, files: list[ExtractPath], tables: tuple[SourceTable, ...]
) -> dict[str, ExtractTable]:
    """Group a bulk-data export's files by resource type into the canonical tables.

    A type with no file has no resources (bulk export writes no empty files), so its table is
    empty; only Patient files are required.

    Raises:
        ExtractError: No Patient resources (``missing-table``, ``empty-table``), or a table
            FHIR cannot give (``unknown-table``); located at the folder.
    """
    typed = [(path, _fhir_type(path)) for path in files]
    found: dict[str, ExtractTable] = {}
    for table in tables:
        if table.name not in FHIR_RESOURCES:
            raise ExtractError(
                f"a FHIR export has no table '{table.name}'",
                code="unknown-table",
                where=str(folder),
            )
        wanted = FHIR_RESOURCES[table.name]
        mine = sorted((kind, path) for path, kind in typed if kind in wanted)
        if table.name == "patients" and not mine:
            raise ExtractError(
                "FHIR export without Patient resources (looked for Patient*.ndjson)",
                code="missing-table",
                where=str(folder),
            )
        if table.name == "patients" and not any(_has_resources(path) for _, path in mine):
            # Every event would be an orphan: say what is wrong instead.
            names = ", ".join(path.name for _, path in mine)
            raise ExtractError(
                f"FHIR export without Patient resources ({names} empty)",
                code="empty-table",
                where=str(folder),
            )
        found[table.name] = ExtractTable(
            table.name,
            tuple(path for _, path in mine),
            "fhir",
            FHIR_COLUMNS[table.name],
            tuple(str(kind) for kind, _ in mine),
        )
    return found
