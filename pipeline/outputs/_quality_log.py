"""The quality log after the engine: its row accounting checked, its first rows located.

The engine returns the quality log as counts per table, outcome and reason, each with the
position of its first row as one integer. Before anything is written, the build checks that
every table's rows add up (a defect of the tool otherwise, never of the data) and turns each
position into a file a reader can open and a row number.
"""

from __future__ import annotations

from pathlib import Path

import pyarrow as pa

from pipeline.compile import POSITION_BASE
from pipeline.errors import EngineError
from pipeline.extract import ExtractTable
from pipeline.outputs._manifest import extract_root, file_name


def locate_first_rows(
    quality: pa.Table, tables: dict[str, ExtractTable], extract: Path | str
) -> pa.Table:
    """The quality log with each reason's first set-aside row as a file and a row number.

    The engine gives a position (file index * POSITION_BASE + row, CSV only); a reader wants
    the file, relative to the extract's folder (by name alone where a relative path could name
    a private folder, see ``portable_path``), and the row, counted
    from 1 after the header (its line is row + 1 when no field holds a line break and no
    line is blank).
    """
    folder = extract_root(extract)
    files: list[str | None] = []
    rows: list[int | None] = []
    for entry in quality.to_pylist():
        position = entry["first_position"]
        if position is None:
            files.append(None)
            rows.append(None)
            continue
        path = tables[entry["source_table"]].files[position // POSITION_BASE]
        files.append(file_name(path, folder))
        rows.append(position % POSITION_BASE)
    kept = quality.drop_columns(["first_position"])
    kept = kept.append_column("first_file", pa.array(files, pa.string()))
    return kept.append_column("first_row", pa.array(rows, pa.int64()))


def check_row_accounting(quality: pa.Table, rows_read: pa.Table) -> dict[str, dict[str, int]]:
    """Check used + set aside = read for every table; return the per-table summary.

    Raises:
        EngineError: A table's rows do not add up (a defect of the tool, never of the data).
    """
    read = {row["source_table"]: row["n_rows"] for row in rows_read.to_pylist()}
    summary: dict[str, dict[str, int]] = {
        table: {"read": n, "used": 0, "set_aside": 0} for table, n in read.items()
    }
    for row in quality.to_pylist():
        key = "used" if row["outcome"] == "used" else "set_aside"
        summary[row["source_table"]][key] += row["n_rows"]
    for table, counts in summary.items():
        if counts["used"] + counts["set_aside"] != counts["read"]:
            raise EngineError(
                f"row accounting failed for {table}: read {counts['read']:,}, used "
                f"{counts['used']:,}, set aside {counts['set_aside']:,}",
                code="row-accounting-failed",
                where="stage quality_log",
            )
    return summary
