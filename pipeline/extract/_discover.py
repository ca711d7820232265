"""Find the canonical tables in an extract folder and check their columns before any work.

Only file names and headers are read here; the rows are read by the engine.
"""

from __future__ import annotations

import csv
import gzip
import re
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO, Literal, cast
from urllib.parse import urlparse
from urllib.request import url2pathname

import pyarrow.parquet as pq

from pipeline.compile import SourceTable
from pipeline.config._mapping import TableMapping
from pipeline.errors import ExtractError
from pipeline.extract._hadoop import HadoopPath

FileFormat = Literal["csv", "parquet", "fhir"]

# A local path, or a file or folder on one of Spark's Hadoop file systems.
ExtractPath = Path | HadoopPath

_SUFFIXES: dict[str, FileFormat] = {".csv": "csv", ".csv.gz": "csv", ".parquet": "parquet"}


@dataclass(frozen=True)
class ExtractTable:
    """One canonical table found in the extract.

    Attributes:
        name: Canonical table name.
        files: The files holding it (several for a folder of Parquet parts), sorted.
        file_format: ``csv``, ``parquet`` or ``fhir`` (a FHIR R4 bulk-data export).
        columns: Column names present in the file, lower-cased, in file order (for ``fhir``,
            the canonical columns the engine derives from the resources).
        resources: For ``fhir``, the resource type each file holds (parallel to ``files``).
        mapping: When read through a site mapping file, how its columns map to ours.
    """

    name: str
    files: tuple[ExtractPath, ...]
    file_format: FileFormat
    columns: tuple[str, ...]
    resources: tuple[str, ...] = ()
    mapping: TableMapping | None = None

    @property
    def provides(self) -> tuple[str, ...]:
        """The canonical columns this table provides (through the mapping, if it has one)."""
        return tuple(self.mapping.columns) if self.mapping is not None else self.columns


_SCHEME = re.compile(r"^([A-Za-z][A-Za-z0-9+.-]*)://")


def extract_location(text: str) -> Path | str:
    """An extract given as a path or a URI: a local path, or a URI for Spark's file systems.

    ``file://`` URIs are local paths. Other schemes (``hdfs://``, ``s3a://``) stay text: such
    an extract is listed, read and hashed through the Hadoop file systems of the Spark session
    (see :mod:`pipeline.extract._hadoop`), so it needs ``--engine spark``.

    Raises:
        ExtractError: A ``file://`` URI of another host.
    """
    found = _SCHEME.match(text)
    if not found:
        return Path(text)
    parsed = urlparse(text)
    if parsed.scheme.lower() != "file":
        return text
    if parsed.netloc not in ("", "localhost"):
        raise ExtractError(
            f"{text}: a file:// URI names a path on this machine, not on host "
            f"'{parsed.netloc}' (write file:///path)"
        )
    return Path(url2pathname(parsed.path))


def _candidates(folder: ExtractPath, name: str) -> list[tuple[tuple[ExtractPath, ...], FileFormat]]:
    found: list[tuple[tuple[ExtractPath, ...], FileFormat]] = []
    for suffix, file_format in _SUFFIXES.items():
        path = folder / f"{name}{suffix}"
        if path.is_file():
            found.append(((path,), file_format))
    parts = folder / name
    if parts.is_dir():
        files = tuple(sorted(parts.glob("*.parquet")))
        if files:
            found.append((files, "parquet"))
    return found


# What the first bytes of a file that is not CSV text say it is.
_NOT_TEXT = {
    b"PAR1": "a Parquet file",
    b"\x1f\x8b": "gzip-compressed (name it .csv.gz)",
    b"PK\x03\x04": "a zip archive (a spreadsheet?)",
    b"\xff\xfe": "UTF-16 text",
    b"\xfe\xff": "UTF-16 text",
}
_HEADER_BYTES = 1 << 20
_OTHER_DELIMITERS = (";", "\t", "|")


@contextmanager
def _open_bytes(path: ExtractPath) -> Iterator[BinaryIO]:
    """A file's bytes, unzipped when its name ends in ``.gz`` (local or on a Hadoop system)."""
    with path.open("rb") as raw:
        if path.name.endswith(".gz"):
            with gzip.GzipFile(fileobj=raw) as unzipped:
                yield cast(BinaryIO, unzipped)
        else:
            yield cast(BinaryIO, raw)


def _csv_header(path: ExtractPath) -> list[str]:
    """The names in a CSV file's first line, refusing files that cannot be comma-separated text.

    Only the first line is read: the engine checks the rest (and names the line at fault).
    """
    with _open_bytes(path) as handle:
        line = handle.readline(_HEADER_BYTES)
    if not line:
        raise ExtractError(f"{path}: empty file, no header")
    for magic, what in _NOT_TEXT.items():
        if line.startswith(magic):
            raise ExtractError(f"{path}: this is {what}, not CSV text")
    if b"\x00" in line:
        raise ExtractError(f"{path}: line 1 holds NUL bytes; this is not CSV text")
    try:
        text = line.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        raise ExtractError(
            f"{path}: line 1, byte {err.start + 1}: not valid UTF-8 "
            f"(byte 0x{line[err.start]:02x}); files must be UTF-8 (convert Latin-1 or Windows text)"
        ) from err
    names = next(csv.reader([text]), [])
    if not any(name.strip() for name in names):
        raise ExtractError(f"{path}: line 1 is blank; the first line must be the header")
    if len(names) == 1 and any(d in names[0] for d in _OTHER_DELIMITERS):
        raise ExtractError(
            f"{path}: the header has one column {names[0].strip()!r}; files must be comma-separated"
        )
    return names


def _parquet_names(path: ExtractPath) -> list[str]:
    with path.open("rb") as handle:
        return list(pq.read_schema(handle).names)


def _header(path: ExtractPath, file_format: FileFormat) -> tuple[str, ...]:
    try:
        names = _parquet_names(path) if file_format == "parquet" else _csv_header(path)
    except (OSError, ValueError, csv.Error) as err:
        what = "not a readable Parquet file" if file_format == "parquet" else "cannot be read"
        raise ExtractError(f"{path}: {what}: {err}") from err
    return tuple(n.strip().lower() for n in names)


def _check_columns(table: SourceTable, path: ExtractPath, columns: tuple[str, ...]) -> None:
    present = set(columns)
    missing = [c for c in table.required if c not in present]
    for group in table.one_of:
        if not present.intersection(group):
            missing.append(" or ".join(group))
    if missing:
        raise ExtractError(
            f"{path}: table '{table.name}' lacks column(s) {', '.join(missing)}; "
            f"found: {', '.join(columns) or 'no header'}"
        )
    duplicated = sorted({c for c in columns if columns.count(c) > 1})
    if duplicated:
        raise ExtractError(f"{path}: column(s) {', '.join(duplicated)} appear more than once")


# FHIR R4 bulk data: the resource types read for each canonical table, and the columns the
# engine derives from them (pipeline/engine/_fhir.py builds them).
FHIR_RESOURCES: dict[str, tuple[str, ...]] = {
    "patients": ("Patient",),
    "encounters": ("Encounter",),
    "diagnoses": ("Condition",),
    # Medication resources give no rows: medicationReference is followed to them.
    "prescriptions": ("Medication", "MedicationRequest", "MedicationStatement"),
    "measurements": ("Observation",),
}
FHIR_COLUMNS: dict[str, tuple[str, ...]] = {
    "patients": ("patient_id", "birth_date", "birth_year", "sex", "death_date", "practice_id"),
    "encounters": ("patient_id", "encounter_date", "encounter_type"),
    "diagnoses": ("patient_id", "event_date", "code_system", "code", "source"),
    "prescriptions": ("patient_id", "start_date", "stop_date", "atc", "drug_text"),
    "measurements": ("patient_id", "obs_date", "measure", "value_text", "value", "unit"),
}
_NDJSON = (".ndjson", ".ndjson.gz")
# Bulk-data file names: Patient.ndjson, Patient.2.ndjson, Patient_001.ndjson, 1.Patient.ndjson.
_FHIR_NAME = re.compile(r"^(?:[0-9]+[._-])?([A-Z][A-Za-z]+)(?:[._-].*)?$")


def _ndjson_files(folder: ExtractPath) -> list[ExtractPath]:
    return sorted(p for p in folder.iterdir() if p.is_file() and p.name.endswith(_NDJSON))


def _fhir_type(path: ExtractPath) -> str | None:
    stem = path.name.removesuffix(".gz").removesuffix(".ndjson")
    match = _FHIR_NAME.match(stem)
    return match.group(1) if match else None


def _has_resources(path: ExtractPath) -> bool:
    """Whether an NDJSON file holds anything but blank space (read up to its first byte)."""
    try:
        with _open_bytes(path) as handle:
            while chunk := handle.read(1 << 16):
                if chunk.strip(b" \t\r\n\xef\xbb\xbf"):
                    return True
    except (OSError, EOFError) as err:
        raise ExtractError(f"{path}: cannot be read: {err}") from err
    return False


def _discover_fhir(
    folder: ExtractPath, files: list[ExtractPath], tables: tuple[SourceTable, ...]
) -> dict[str, ExtractTable]:
    """Group a bulk-data export's files by resource type into the canonical tables.

    A type with no file has no resources (bulk export writes no empty files), so its table is
    empty; only Patient files are required.
    """
    typed = [(path, _fhir_type(path)) for path in files]
    found: dict[str, ExtractTable] = {}
    for table in tables:
        if table.name not in FHIR_RESOURCES:
            raise ExtractError(f"{folder}: a FHIR export has no table '{table.name}'")
        wanted = FHIR_RESOURCES[table.name]
        mine = sorted((kind, path) for path, kind in typed if kind in wanted)
        if table.name == "patients" and not mine:
            raise ExtractError(
                f"{folder}: FHIR export without Patient resources (looked for Patient*.ndjson)"
            )
        if table.name == "patients" and not any(_has_resources(path) for _, path in mine):
            # Every event would be an orphan: say what is wrong instead.
            names = ", ".join(path.name for _, path in mine)
            raise ExtractError(f"{folder}: FHIR export without Patient resources ({names} empty)")
        found[table.name] = ExtractTable(
            table.name,
            tuple(path for _, path in mine),
            "fhir",
            FHIR_COLUMNS[table.name],
            tuple(str(kind) for kind, _ in mine),
        )
    return found


def discover_folder(
    folder: ExtractPath, tables: tuple[SourceTable, ...]
) -> dict[str, ExtractTable]:
    """Locate each table the plan reads and check it has the columns the plan needs.

    A folder holding ``*.ndjson`` files is read as a FHIR R4 bulk-data export instead. The
    folder may be a local one or on a Hadoop file system (:class:`HadoopPath`): discovery
    uses only the methods both offer.

    Raises:
        ExtractError: The folder or a table is missing, ambiguous, unreadable, or lacks a
            required column. The message names the file and the column.
    """
    if not folder.is_dir():
        raise ExtractError(f"{folder}: the extract folder does not exist")
    ndjson = _ndjson_files(folder)
    if ndjson:
        tabular = [files[0] for t in tables for files, _ in _candidates(folder, t.name)]
        if tabular:
            raise ExtractError(
                f"{folder}: holds both FHIR NDJSON files and canonical tables ({tabular[0]}); "
                "keep one kind of extract per folder"
            )
        return _discover_fhir(folder, ndjson, tables)
    found: dict[str, ExtractTable] = {}
    for table in tables:
        candidates = _candidates(folder, table.name)
        if not candidates:
            raise ExtractError(
                f"{folder}: table '{table.name}' not found "
                f"(looked for {table.name}.csv, {table.name}.parquet, {table.name}/*.parquet)"
            )
        if len(candidates) > 1:
            names = ", ".join(str(files[0]) for files, _ in candidates)
            raise ExtractError(f"{folder}: table '{table.name}' is ambiguous: {names}")
        files, file_format = candidates[0]
        columns = _header(files[0], file_format)
        _check_columns(table, files[0], columns)
        for other in files[1:]:
            if _header(other, file_format) != columns:
                raise ExtractError(f"{other}: columns differ from {files[0]}")
        found[table.name] = ExtractTable(table.name, files, file_format, columns)
    return found
