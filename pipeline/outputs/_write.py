"""Write a run's outputs into a folder: complete files only, and a failed run changes nothing.

Data files hold no timestamps and are written with fixed settings, so the same inputs give the
same bytes; when and where the run happened goes to ``run.json`` only.
"""

from __future__ import annotations

import csv
import json
import shutil
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from pipeline.compile import ColumnDoc
from pipeline.outputs._manifest import MANIFEST, sha256_file
from pipeline.outputs._ownership import BUILD, install, staging

ATTRITION_COLUMNS = ("step", "description", "patients_before", "removed", "remaining")


DECIMALS = 6


def round_doubles(table: pa.Table) -> pa.Table:
    """Round every floating-point column to 6 decimals, in Python, for every engine alike.

    The last bits of a mean or a power depend on summation order and on the maths library
    (DuckDB's C vs Spark's Java), so values are rounded in one place for the outputs to be
    identical bit for bit; 6 decimals is far finer than any measure here is recorded, and
    makes a value whose two engines' results round differently (a tie) very unlikely.
    """
    columns = [
        pc.round(column, DECIMALS) if pa.types.is_floating(column.type) else column
        for column in table.columns
    ]
    return pa.Table.from_arrays(columns, schema=table.schema)


_PARQUET: dict[str, Any] = {
    "compression": "zstd",
    "compression_level": 3,
    "use_dictionary": True,
    "write_statistics": True,
}
"""The writer settings of every Parquet output (fixed, for deterministic bytes)."""

ROW_GROUP_ROWS = 1_000_000
"""Rows per row group of an output written whole."""

STREAMED_ROW_GROUP_ROWS = 131_072
"""Rows per row group of an output streamed from the engine (cohort, population, episodes,
person-time).

The writer holds one row group's rows before writing them, so this bounds the rows in Python
whatever the cohort's size (a demo cohort row is about 150 bytes of Arrow: some 20 MB;
person-time about 66 bytes a row, under 10 MB). Smaller row groups compress a little less well
(at 200,000 patients the person-time file is 5% larger than in one group); a file of at most
this many rows is one row group, byte for byte the file written whole.
"""


def write_parquet(table: pa.Table, path: Path, row_group_rows: int = ROW_GROUP_ROWS) -> None:
    """Write a table to Parquet with fixed writer settings (deterministic bytes).

    The columns are made one chunk each first: the Parquet writer gives up a column's
    dictionary (past its 1 MB page limit, e.g. 131,072 distinct patient ids) at a point that
    depends on where the Arrow chunks end, so the same rows in other chunks (DuckDB's batches,
    Spark's partitions) would make other bytes.
    """
    pq.write_table(
        round_doubles(table.combine_chunks()), path, row_group_size=row_group_rows, **_PARQUET
    )


def write_parquet_stream(
    batches: pa.RecordBatchReader,
    path: Path,
    columns: tuple[ColumnDoc, ...] | None = (),
    row_group_rows: int = STREAMED_ROW_GROUP_ROWS,
) -> int:
    """Write a stream of batches to Parquet, one row group at a time; return the rows written.

    The bytes are those :func:`write_parquet` writes for the whole table with
    ``row_group_rows`` (each row group is made one chunk per column before it is written, as
    :func:`write_parquet` makes the whole table, and one call per row group writes what one
    call with that row group size writes), so a streamed output is the same file whichever
    engine fetched it and however it was batched. The column documentation goes into the
    schema as in :func:`with_column_docs`; ``columns=None`` writes the schema as it comes
    (``population.parquet`` carries no dictionary).
    """
    schema = batches.schema
    if columns is not None:
        schema = with_column_docs(schema.empty_table(), columns).schema
    pending: list[pa.RecordBatch] = []
    held = written = 0

    def flush(writer: pq.ParquetWriter) -> None:
        nonlocal held, written
        table = pa.Table.from_batches(pending, batches.schema).combine_chunks()
        writer.write_table(round_doubles(table.cast(schema)), row_group_size=row_group_rows)
        written += table.num_rows
        pending.clear()
        held = 0

    with pq.ParquetWriter(path, schema, **_PARQUET) as writer:
        for batch in batches:
            while batch.num_rows:
                part = batch.slice(0, row_group_rows - held)
                pending.append(part)
                held += part.num_rows
                batch = batch.slice(part.num_rows)
                if held == row_group_rows:
                    flush(writer)
        if pending or not written:  # the last rows; an empty output is one empty row group
            flush(writer)
    return written


def parquet_sink(
    path: Path, columns: tuple[ColumnDoc, ...] | None = ()
) -> Callable[[pa.RecordBatchReader], int]:
    """A sink for :meth:`pipeline.engine.Engine.run` writing an output to ``path`` as it comes.

    ``columns`` as in :func:`write_parquet_stream` (None: no column documentation); row groups
    of :data:`STREAMED_ROW_GROUP_ROWS`, read when the output arrives.
    """
    return lambda batches: write_parquet_stream(batches, path, columns, STREAMED_ROW_GROUP_ROWS)


COLUMN_DOCS_KEY = "ascertain.columns"


def with_column_docs(table: pa.Table, columns: tuple[ColumnDoc, ...]) -> pa.Table:
    """The table with each column's meaning and unit from the data dictionary in its schema.

    Each field gets ``description``, ``unit`` (when it has one) and ``computed`` (read back by
    pyarrow as ``schema.field(name).metadata``); the schema also gets one JSON object of all
    columns under ``ascertain.columns`` (read back by ``polars.read_parquet_metadata``, which
    does not expose field metadata), so the file describes itself without the dictionary files.
    Columns the dictionary does not list are left as they are.
    """
    docs = {doc.column: doc for doc in columns}
    fields = []
    described: dict[str, dict[str, str]] = {}
    for field in table.schema:
        doc = docs.get(field.name)
        if doc is None:
            fields.append(field)
            continue
        entry = {"description": doc.meaning, "unit": doc.unit, "computed": doc.computed}
        entry = {key: text for key, text in entry.items() if text}
        described[field.name] = entry
        fields.append(field.with_metadata({k.encode(): v.encode() for k, v in entry.items()}))
    text = json.dumps(described, sort_keys=True, ensure_ascii=False)
    schema = pa.schema(fields, metadata={COLUMN_DOCS_KEY.encode(): text.encode()})
    return table.cast(schema)


QUALITY_COLUMNS = ("source_table", "outcome", "reason", "n_rows", "first_file", "first_row")


def write_csv(table: pa.Table, columns: tuple[str, ...], path: Path) -> None:
    """Write some columns of a table as CSV, in the table's row order."""
    rows = table.select(list(columns)).to_pylist()
    with path.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=columns, lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)


def write_attrition(table: pa.Table, path: Path) -> None:
    """Write the attrition log as CSV with the columns a reader expects, in step order."""
    write_csv(table, ATTRITION_COLUMNS, path)


DICTIONARY_COLUMNS = ("column", "type", "unit", "meaning", "computed", "sources")


def write_dictionary(
    columns: tuple[ColumnDoc, ...],
    folder: Path,
    further: tuple[tuple[str, tuple[ColumnDoc, ...]], ...] = (),
) -> None:
    """Write the data dictionary as ``dictionary.csv`` and ``dictionary.md``.

    ``further`` documents other files by name (``persontime.parquet``): in the CSV their rows
    follow the cohort's, each column named with its file's stem (``persontime.days``), so one
    table can be filtered by file; the Markdown gives each file a section of its own.
    """
    rows = [{name: getattr(doc, name) for name in DICTIONARY_COLUMNS} for doc in columns]
    further_rows = [
        (file, [{name: getattr(doc, name) for name in DICTIONARY_COLUMNS} for doc in docs])
        for file, docs in further
    ]
    with (folder / "dictionary.csv").open("w", encoding="utf-8", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=DICTIONARY_COLUMNS, lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
        for file, file_rows in further_rows:
            stem = file.split(".")[0]
            writer.writerows({**row, "column": f"{stem}.{row['column']}"} for row in file_rows)
    lines = [
        "# Data dictionary of cohort.parquet",
        "",
        "Research use only; not for clinical decisions. Suppress small counts before sharing "
        "any summary, and follow your local data-governance rules.",
        "",
        *_markdown_table(rows),
    ]
    for file, file_rows in further_rows:
        lines += ["", f"# Data dictionary of {file}", "", *_markdown_table(file_rows)]
    (folder / "dictionary.md").write_text("\n".join(lines) + "\n", encoding="utf-8")


def _markdown_table(rows: list[dict[str, str]]) -> list[str]:
    lines = [
        "| " + " | ".join(DICTIONARY_COLUMNS) + " |",
        "|" + "---|" * len(DICTIONARY_COLUMNS),
    ]
    return lines + [
        "| " + " | ".join(str(row[c]).replace("|", "\\|") for c in DICTIONARY_COLUMNS) + " |"
        for row in rows
    ]


def write_json(data: dict[str, Any], path: Path) -> None:
    """Write JSON with sorted keys and a trailing newline."""
    path.write_text(json.dumps(data, indent=2, sort_keys=True, default=str) + "\n", "utf-8")


@dataclass(frozen=True)
class Written:
    """What :func:`write_outputs` did: the files it wrote and notes for the user.

    Attributes:
        files: The paths written, in a fixed order.
        notes: Sentences about files it removed (a report of the previous cohort).
    """

    files: list[Path]
    notes: list[str]


def write_outputs(
    target: Path,
    *,
    cohort: pa.Table | Path,
    population: pa.Table | Path,
    attrition: pa.Table,
    quality: pa.Table,
    columns: tuple[ColumnDoc, ...],
    manifest: dict[str, Any],
    run_info: dict[str, Any],
    persontime: pa.Table | Path | None = None,
    persontime_columns: tuple[ColumnDoc, ...] = (),
    matched: pa.Table | None = None,
    matched_columns: tuple[ColumnDoc, ...] = (),
    episodes: pa.Table | None = None,
    episodes_columns: tuple[ColumnDoc, ...] = (),
) -> Written:
    """Write the cohort, attrition log, data dictionary, manifest and run record.

    Files are written to a hidden sibling folder first and moved in only when all are
    complete (:func:`pipeline.outputs._ownership.install`), so a failed run leaves the previous
    output untouched. Only files a previous build listed in its manifest are replaced or
    removed; a report written for the previous cohort is removed, with a note saying so. The
    manifest gets the hash of every data file; ``run.json`` (when and how long) is the only
    file that differs between runs. ``persontime`` (with its dictionary) is written as
    ``persontime.parquet`` when the study asks for it, ``matched`` as ``matched.parquet`` and
    ``episodes`` as ``episodes.parquet``. An output given as a path (the cohort, the
    population, ...) is a file the build already wrote, streamed from the engine through
    :func:`parquet_sink` with the same documentation this function would give it, and is
    moved in as it is.

    Raises:
        OutputFolderError: ``target`` holds files ascertain did not write there.
    """
    extra = [
        (file, table, docs)
        for file, table, docs in (
            (PERSONTIME, persontime, persontime_columns),
            (MATCHED, matched, matched_columns),
            (EPISODES, episodes, episodes_columns),
        )
        if table is not None
    ]
    data_files = [*DATA_FILES, *(file for file, _, _ in extra)]
    names = [*data_files, MANIFEST, "run.json"]
    further = tuple((file, docs) for file, _, docs in extra)
    with staging(target) as staged:
        _place(cohort, columns, staged / "cohort.parquet")
        _place(population, None, staged / "population.parquet")
        write_attrition(attrition, staged / "attrition.csv")
        write_csv(quality, QUALITY_COLUMNS, staged / "quality.csv")
        write_dictionary(columns, staged, further)
        for file, table, docs in extra:
            _place(table, docs, staged / file)
        hashed = {name: sha256_file(staged / name) for name in data_files}
        write_json({**manifest, "outputs": hashed}, staged / MANIFEST)
        write_json(run_info, staged / "run.json")
        notes = install(staged, target, BUILD, names)
    return Written([target / name for name in names], notes)


def _place(data: pa.Table | Path, columns: tuple[ColumnDoc, ...] | None, path: Path) -> None:
    """Write a table to ``path`` (documented with ``columns`` unless None), or move a file there."""
    if isinstance(data, Path):
        shutil.move(data, path)
    else:
        write_parquet(data if columns is None else with_column_docs(data, columns), path)


DATA_FILES = (
    "cohort.parquet",
    "population.parquet",
    "attrition.csv",
    "quality.csv",
    "dictionary.csv",
    "dictionary.md",
)

PERSONTIME = "persontime.parquet"
"""Written when the study has a ``persontime:`` option (listed in the manifest then)."""

MATCHED = "matched.parquet"
"""Written when the study has a ``matching:`` option (listed in the manifest then)."""

EPISODES = "episodes.parquet"
"""Written when the study's ``exposure:`` has ``episodes:`` (listed in the manifest then)."""

STREAMED_FILES = {
    "cohort": "cohort.parquet",
    "population": "population.parquet",
    "episodes": EPISODES,
    "persontime": PERSONTIME,
}
"""The outputs a build streams from the engine to their files (they grow with the patients).

``matched.parquet`` is not among them: its sets are filled in Python from the candidate pairs.
"""
