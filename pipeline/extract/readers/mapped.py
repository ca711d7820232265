"""A site's own files read through its mapping file (see :mod:`pipeline.config._mapping`).

Discovery (:func:`discover_mapped`) finds each table's files through the mapping and checks
that every column it names is there. The engines then read each canonical column with
:func:`source_column`: the site's column (or a constant), with the site's values translated and
its dates parsed by the mapping's format. Whatever does not translate or parse is passed on as
it is (or as NULL for a date), so the quality log can still judge the row.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.config._mapping import Constant, load_mapping
from pipeline.config._yaml import load_yaml
from pipeline.errors import ConfigError, ExtractError
from pipeline.extract._table import ExtractPath, ExtractTable, FileFormat
from pipeline.extract.readers.csv_parquet import check_columns, header
from pipeline.extract.schema import DATE_COLUMNS, SourceTable

EXCEL_EPOCH = "1899-12-30"  # day 0 of spreadsheet serial dates (with the 1900 leap-year quirk)


def source_column(table: ExtractTable, canonical: str) -> exp.Expression:
    """The expression giving canonical column ``canonical`` of ``table``.

    Without a mapping it is the file's own column of that name.
    """
    spec = table.mapping
    if spec is None:
        return exp.column(canonical)
    source = spec.columns[canonical]
    if isinstance(source, Constant):
        column: exp.Expression = exp.Literal.string(source.value)
    else:
        column = exp.column(exp.to_identifier(source.strip(), quoted=True))
    translations = spec.values.get(canonical)
    if translations:
        text = exp.Trim(this=exp.cast(column, "VARCHAR"))
        case = exp.Case()
        for theirs, ours in sorted(translations.items()):
            case = case.when(text.copy().eq(exp.Literal.string(theirs)), exp.Literal.string(ours))
        column = case.else_(column.copy())
    if canonical in DATE_COLUMNS and spec.dates != "iso":
        text = exp.Trim(this=exp.cast(column, "VARCHAR"))
        if spec.dates == "excel":
            serial = exp.TryCast(
                this=exp.TryCast(this=text, to=exp.DataType.build("DOUBLE")),
                to=exp.DataType.build("INT"),
            )
            epoch = exp.cast(exp.Literal.string(EXCEL_EPOCH), exp.DataType.Type.DATE)
            column = exp.Add(this=epoch, expression=serial)
        else:
            parsed = exp.func("TRY_STRPTIME", text, exp.Literal.string(spec.dates))
            column = exp.cast(parsed, exp.DataType.Type.DATE)
    return column


def _files(base: ExtractPath, pattern: str) -> tuple[ExtractPath, ...]:
    """The files a table's ``file:`` names, below the mapping's folder (local or Hadoop)."""
    path = base / pattern
    if path.is_dir():
        return tuple(sorted(path.glob("*.parquet")))
    if path.is_file():
        return (path,)
    return tuple(sorted(p for p in base.glob(pattern) if p.is_file()))


def _format(path: ExtractPath) -> FileFormat:
    return "parquet" if path.suffix == ".parquet" else "csv"


def discover_mapped(file: ExtractPath, tables: tuple[SourceTable, ...]) -> dict[str, ExtractTable]:
    """Locate each table through a mapping file and check its source columns.

    The mapping file and the files it names may be on a Hadoop file system (a
    :class:`~pipeline.extract.HadoopPath`, read through the Spark session): the mapping is
    read, its files found and their headers checked through it, as for a local mapping.

    Raises:
        ConfigError: The mapping is invalid, or names a file or column that is not there
            (located at the mapping's line).
        ExtractError: A mapped file cannot be read, or the mapping reads a database.
    """
    loaded = load_mapping(file)
    if loaded.mapping.database is not None:
        raise ExtractError(
            "reads a database; open it with open_extract",
            code="database-mapping",
            where=str(loaded.file),
        )
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
        columns = header(files[0], file_format)
        for other in files[1:]:
            if header(other, _format(other)) != columns:
                raise ExtractError(
                    f"columns differ from {files[0]}", code="header-mismatch", where=str(other)
                )
        for canonical, source in spec.columns.items():
            if isinstance(source, Constant) or source.strip().lower() in columns:
                continue
            problems.append(
                doc.problem(
                    ("tables", table.name, "columns", canonical),
                    "missing-column",
                    f"column '{source}' is not in {files[0].name} "
                    f"(found: {', '.join(columns) or 'no header'})",
                    at_value=True,
                )
            )
        provided = tuple(spec.columns)
        try:
            check_columns(table, files[0], provided)
        except ExtractError as err:
            problems.append(
                doc.problem(("tables", table.name, "columns"), "missing-column", err.message)
            )
            continue
        found[table.name] = ExtractTable(table.name, files, file_format, columns, mapping=spec)
    if problems:
        raise ConfigError(problems)
    return found
