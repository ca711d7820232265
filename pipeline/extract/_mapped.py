"""Find the tables of a site mapping file and check the columns it names exist."""

from __future__ import annotations

from pathlib import Path

from pipeline.compile import SourceTable
from pipeline.config._mapping import Constant, load_mapping
from pipeline.config._yaml import load_yaml
from pipeline.errors import ConfigError, ExtractError
from pipeline.extract._discover import (
    ExtractTable,
    FileFormat,
    _check_columns,
    _header,
    discover_folder,
)


def _files(base: Path, pattern: str) -> tuple[Path, ...]:
    path = base / pattern
    if path.is_dir():
        return tuple(sorted(path.glob("*.parquet")))
    if path.is_file():
        return (path,)
    return tuple(sorted(p for p in base.glob(pattern) if p.is_file()))


def _format(path: Path) -> FileFormat:
    return "parquet" if path.suffix == ".parquet" else "csv"


def discover_mapped(file: Path, tables: tuple[SourceTable, ...]) -> dict[str, ExtractTable]:
    """Locate each table through a mapping file and check its source columns.

    Raises:
        ConfigError: The mapping is invalid, or names a file or column that is not there
            (located at the mapping's line).
        ExtractError: A mapped file cannot be read.
    """
    loaded = load_mapping(file)
    if loaded.mapping.database is not None:
        raise ExtractError(f"{loaded.file}: reads a database; open it with open_extract")
    doc = load_yaml(loaded.file)
    base = loaded.file.parent
    found: dict[str, ExtractTable] = {}
    problems = []
    for table in tables:
        spec = loaded.mapping.tables.get(table.name)
        if spec is None:
            problems.append(
                doc.problem(("tables",), "missing-table", f"no mapping for table '{table.name}'")
            )
            continue
        files = _files(base, spec.file or "")
        if not files:
            problems.append(
                doc.problem(
                    ("tables", table.name, "file"),
                    "missing-file",
                    f"no file matches '{spec.file}' in {base}",
                    at_value=True,
                )
            )
            continue
        file_format = _format(files[0])
        header = _header(files[0], file_format)
        for other in files[1:]:
            if _header(other, _format(other)) != header:
                raise ExtractError(f"{other}: columns differ from {files[0]}")
        for canonical, source in spec.columns.items():
            if isinstance(source, Constant) or source.strip().lower() in header:
                continue
            problems.append(
                doc.problem(
                    ("tables", table.name, "columns", canonical),
                    "missing-column",
                    f"column '{source}' is not in {files[0].name} "
                    f"(found: {', '.join(header) or 'no header'})",
                    at_value=True,
                )
            )
        provided = tuple(spec.columns)
        try:
            _check_columns(table, files[0], provided)
        except ExtractError as err:
            problems.append(
                doc.problem(
                    ("tables", table.name, "columns"), "missing-column", str(err).split(": ", 1)[1]
                )
            )
            continue
        found[table.name] = ExtractTable(table.name, files, file_format, header, mapping=spec)
    if problems:
        raise ConfigError(problems)
    return found


def discover_extract(source: Path, tables: tuple[SourceTable, ...]) -> dict[str, ExtractTable]:
    """Locate each table the plan reads, in an extract folder or through a mapping file.

    A folder holds canonical CSV or Parquet files, or a FHIR R4 bulk export (``*.ndjson``);
    a ``.yaml`` file is a site mapping (see :mod:`pipeline.config._mapping`).

    Raises:
        ExtractError: A table is missing, ambiguous, unreadable or lacks a required column.
        ConfigError: The mapping file is invalid or names a missing file or column.
    """
    if source.is_file() and source.suffix in (".yaml", ".yml"):
        return discover_mapped(source, tables)
    return discover_folder(source, tables)
