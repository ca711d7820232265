"""Canonical CSV and Parquet files: their headers checked before any work, their rows as read.

Discovery reads only file names and headers (:func:`header`, :func:`check_columns`,
:func:`discover_tabular`); the rows are read by the engine: on DuckDB through
:func:`table_function`, on Spark by its own CSV and Parquet readers with the same options.
"""

from __future__ import annotations

import csv
import gzip
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import BinaryIO, cast

import pyarrow.parquet as pq
from sqlglot import exp

from pipeline.errors import ExtractError
from pipeline.extract._table import ExtractPath, ExtractTable, FileFormat
from pipeline.extract.schema import SourceTable

_SUFFIXES: dict[str, FileFormat] = {".csv": "csv", ".csv.gz": "csv", ".parquet": "parquet"}


def candidates(folder: ExtractPath, name: str) -> list[tuple[tuple[ExtractPath, ...], FileFormat]]:
    """Every way a canonical folder may hold table ``name``: a CSV, a Parquet file or parts."""
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
def open_bytes(path: ExtractPath) -> Iterator[BinaryIO]:
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
    with open_bytes(path) as handle:
        line = handle.readline(_HEADER_BYTES)
    first = f"{path}:1"
    if not line:
        raise ExtractError("empty file, no header", code="empty-file", where=str(path))
    for magic, what in _NOT_TEXT.items():
        if line.startswith(magic):
            raise ExtractError(f"this is {what}, not CSV text", code="not-csv", where=str(path))
    if b"\x00" in line:
        raise ExtractError(
            "line 1 holds NUL bytes; this is not CSV text", code="not-csv", where=first
        )
    try:
        text = line.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        raise ExtractError(
            f"byte {err.start + 1}: not valid UTF-8 (byte 0x{line[err.start]:02x}); files must "
            "be UTF-8 (convert Latin-1 or Windows text)",
            code="not-utf8",
            where=first,
        ) from err
    names = next(csv.reader([text]), [])
    if not any(name.strip() for name in names):
        raise ExtractError(
            "line 1 is blank; the first line must be the header", code="blank-header", where=first
        )
    if len(names) == 1 and any(d in names[0] for d in _OTHER_DELIMITERS):
        raise ExtractError(
            f"the header has one column {names[0].strip()!r}; files must be comma-separated",
            code="wrong-delimiter",
            where=first,
        )
    return names


def _parquet_names(path: ExtractPath) -> list[str]:
    with path.open("rb") as handle:
        return list(pq.read_schema(handle).names)


def header(path: ExtractPath, file_format: FileFormat) -> tuple[str, ...]:
    """A CSV or Parquet file's column names, stripped and lower-cased, in file order.

    Raises:
        ExtractError: The file cannot be read, or is not comma-separated UTF-8 text (CSV).
    """
    try:
        names = _parquet_names(path) if file_format == "parquet" else _csv_header(path)
    except (OSError, ValueError, csv.Error) as err:
        what = "not a readable Parquet file" if file_format == "parquet" else "cannot be read"
        raise ExtractError(f"{what}: {err}", code="unreadable-file", where=str(path)) from err
    return tuple(n.strip().lower() for n in names)


def check_columns(table: SourceTable, path: ExtractPath, columns: tuple[str, ...]) -> None:
    """Refuse a table whose ``columns`` lack one the plan needs, or name one twice.

    Raises:
        ExtractError: ``missing-column`` or ``duplicate-column``, located at ``path``.
    """
    present = set(columns)
    missing = [c for c in table.required if c not in present]
    for group in table.one_of:
        if not present.intersection(group):
            missing.append(" or ".join(group))
    if missing:
        raise ExtractError(
            f"table '{table.name}' lacks column(s) {', '.join(missing)}; "
            f"found: {', '.join(columns) or 'no header'}",
            code="missing-column",
            where=str(path),
        )
    duplicated = sorted({c for c in columns if columns.count(c) > 1})
    if duplicated:
        raise ExtractError(
            f"column(s) {', '.join(duplicated)} appear more than once",
            code="duplicate-column",
            where=str(path),
        )


def check_same_header(
    files: tuple[ExtractPath, ...], file_format: FileFormat, columns: tuple[str, ...]
) -> None:
    """Refuse a table whose later files' headers differ from its first file's ``columns``.

    Raises:
        ExtractError: ``header-mismatch``, naming the first file that differs.
    """
    for other in files[1:]:
        if header(other, file_format) != columns:
            raise ExtractError(
                f"columns differ from {files[0]}", code="header-mismatch", where=str(other)
            )


def discover_tabular(
    folder: ExtractPath, tables: tuple[SourceTable, ...]
) -> dict[str, ExtractTable]:
    """Locate each table in a canonical folder and check it has the columns the plan needs.

    Raises:
        ExtractError: A table is missing (``missing-table``), ambiguous, unreadable, or lacks
            a required column; the error names the folder or the file.
    """
    found: dict[str, ExtractTable] = {}
    for table in tables:
        options = candidates(folder, table.name)
        if not options:
            raise ExtractError(
                f"table '{table.name}' not found "
                f"(looked for {table.name}.csv, {table.name}.parquet, {table.name}/*.parquet)",
                code="missing-table",
                where=str(folder),
            )
        if len(options) > 1:
            names = ", ".join(str(files[0]) for files, _ in options)
            raise ExtractError(
                f"table '{table.name}' is ambiguous: {names}",
                code="ambiguous-table",
                where=str(folder),
            )
        files, file_format = options[0]
        columns = header(files[0], file_format)
        check_columns(table, files[0], columns)
        check_same_header(files, file_format, columns)
        found[table.name] = ExtractTable(table.name, files, file_format, columns)
    return found


def _csv_options(table: ExtractTable) -> dict[str, exp.Expression]:
    # The header as discovery read it (stripped, lower-cased); a blank or repeated name, which
    # no canonical or mapped column can be, gets a positional one so DuckDB accepts the list.
    names = [
        name if name and name not in table.columns[:i] else f"column{i + 1}"
        for i, name in enumerate(table.columns)
    ]
    text = exp.Literal.string
    columns = exp.Struct(
        expressions=[exp.PropertyEQ(this=text(n), expression=text("VARCHAR")) for n in names]
    )
    return {
        "header": exp.true(),
        "auto_detect": exp.false(),
        "columns": columns,
        "delim": text(","),
        "quote": text('"'),
        "escape": text('"'),
        "encoding": text("utf-8"),
        "strict_mode": exp.true(),
        "null_padding": exp.false(),
    }


def table_function(table: ExtractTable, files: tuple[Path, ...] | None = None) -> exp.Expression:
    """The DuckDB table function reading one extract table's files, every CSV value as text.

    CSV files are read as RFC 4180 says and nothing is guessed: comma-separated, UTF-8 (a
    byte-order mark is skipped), fields quoted with ``"`` (which may hold commas and line
    breaks; ``""`` is a quote), the first line a header, skipped, whose names discovery read
    into ``table.columns`` (so these must be the file's header, in file order). With
    auto-detection off DuckDB never guesses a comment character, rows to skip or types, so no
    line can disappear unnoticed, and its errors give the right line.

    A ragged row, with too few or too many fields, is refused: the read fails and the engine
    reports an ``ExtractError`` naming the file, the line and the first missing or extra
    column (see the DuckDB engine's ``_read_failure``); so do text that is not UTF-8, a quote
    never closed and a line longer than DuckDB's maximum line size. Padding short rows
    (``null_padding``) was rejected: DuckDB pads only in its single-threaded reader once fields
    hold line breaks, and that reader silently drops the rest of a file after a quote that is
    never closed.

    Delimiters other than the comma, other encodings, empty files and files that are not what
    their name says are refused earlier, when discovery reads the header.
    """
    paths = exp.Array(expressions=[exp.Literal.string(str(f)) for f in files or table.files])
    if table.file_format == "parquet":
        return exp.func("read_parquet", paths)
    return exp.func(
        "read_csv",
        paths,
        *(exp.PropertyEQ(this=exp.var(k), expression=v) for k, v in _csv_options(table).items()),
    )
