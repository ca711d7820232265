"""Find the canonical tables in an extract folder and check their columns before any work.

Only file names and headers are read here; the rows are read by the engine.
"""

from __future__ import annotations

import csv
import gzip
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import pyarrow.parquet as pq

from pipeline.compile import SourceTable
from pipeline.errors import ExtractError

FileFormat = Literal["csv", "parquet"]

_SUFFIXES: dict[str, FileFormat] = {".csv": "csv", ".csv.gz": "csv", ".parquet": "parquet"}


@dataclass(frozen=True)
class ExtractTable:
    """One canonical table found in the extract.

    Attributes:
        name: Canonical table name.
        files: The files holding it (several for a folder of Parquet parts), sorted.
        file_format: ``csv`` or ``parquet``.
        columns: Column names present in the file, lower-cased, in file order.
    """

    name: str
    files: tuple[Path, ...]
    file_format: FileFormat
    columns: tuple[str, ...]


def _candidates(folder: Path, name: str) -> list[tuple[tuple[Path, ...], FileFormat]]:
    found: list[tuple[tuple[Path, ...], FileFormat]] = []
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


def _header(path: Path, file_format: FileFormat) -> tuple[str, ...]:
    try:
        if file_format == "parquet":
            names = pq.read_schema(path).names
        else:
            opener = gzip.open if path.suffix == ".gz" else open
            with opener(path, "rt", encoding="utf-8-sig", newline="") as handle:
                names = next(csv.reader(handle), [])
    except (OSError, UnicodeDecodeError, ValueError) as err:
        raise ExtractError(f"{path}: cannot read the header: {err}") from err
    return tuple(n.strip().lower() for n in names)


def _check_columns(table: SourceTable, path: Path, columns: tuple[str, ...]) -> None:
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


def discover_extract(folder: Path, tables: tuple[SourceTable, ...]) -> dict[str, ExtractTable]:
    """Locate each table the plan reads and check it has the columns the plan needs.

    Raises:
        ExtractError: The folder or a table is missing, ambiguous, unreadable, or lacks a
            required column. The message names the file and the column.
    """
    if not folder.is_dir():
        raise ExtractError(f"{folder}: the extract folder does not exist")
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
