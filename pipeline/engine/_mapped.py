"""Column expressions for tables read through a site mapping file.

Each canonical column is the site's column (or a constant), with the site's values translated
and its dates parsed by the mapping's format. Whatever does not translate or parse is passed on
as it is (or as NULL for a date), so the quality log can still judge the row.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.config._mapping import DATE_COLUMNS, Constant
from pipeline.extract import ExtractTable

EXCEL_EPOCH = "1899-12-30"  # day 0 of spreadsheet serial dates (with the 1900 leap-year quirk)


def source_column(table: ExtractTable, canonical: str) -> exp.Expression:
    """The expression giving canonical column ``canonical`` of ``table``."""
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
