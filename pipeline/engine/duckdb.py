"""Run a plan on DuckDB, embedded, with a scratch folder for spilling.

The steps every engine shares (binding, the stage loop, fetching) are in
:mod:`pipeline.engine.base`; this module says how DuckDB reads the extract files (CSV as text,
nothing guessed, every row with its position), which optimizers it runs without, how it creates
views and tables, and how its errors name a file and a line.
"""

from __future__ import annotations

import json
import os
import re
import tempfile
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import duckdb
import pyarrow as pa
from sqlglot import exp

from pipeline.compile import Stage
from pipeline.engine.base import Engine
from pipeline.errors import ExtractError
from pipeline.extract import ExtractTable, fhir_source, table_function
from pipeline.extract.schema import POSITION_BASE, SOURCE_POSITION, SourceTable

_OPTIMIZERS = exp.select("name").from_("duckdb_optimizers()").sql("duckdb")

# Optimizers the engine turns off (where this DuckDB has them):
# - type_pushdown: DuckDB 2.0 pushes TRY_CAST into the CSV reader as a strict cast, so one bad
#   value in a text column would fail the whole read; every value must reach our own TRY_CAST.
# - build_side_probe_side: it swaps a join's sides by estimated sizes, and after a stage's
#   filters it can take tens of millions of extract rows for a few hundred thousand and build
#   its hash table on them instead of on the patients (at 2M patients: 8-10 s for one such join
#   instead of about 1 s). Without it an outer join builds on the side written on the right
#   (the patients, or a small table, in this plan) and an inner join on the side the join
#   order optimizer picks.
_DISABLED_OPTIMIZERS = ("type_pushdown", "build_side_probe_side")

FETCH_ROWS = 65_536
"""Rows per batch when an output is streamed to a sink (a few MB of person-time cells)."""


def _rows(table: ExtractTable, source: SourceTable | None = None) -> exp.Expression:
    """The rows of one extract table, each CSV row with its position (see SOURCE_POSITION).

    ``source`` is the table as the plan reads it: the FHIR reader takes from it the code
    systems and LOINC codes the study reads.

    Each CSV file is read on its own and numbered by ``ROW_NUMBER() OVER ()``, which DuckDB
    runs as a streaming window over the reader's output in file order. Blank lines are not
    records, so a row's line is row + 1 only in a file without blank lines or quoted breaks.
    """
    # A file's own column of that name gives way to ours, as with Spark's withColumn.
    own = [exp.column(SOURCE_POSITION)] if SOURCE_POSITION in table.columns else []
    every = exp.Star(except_=own) if own else exp.Star()
    no_position = exp.cast(exp.null(), "BIGINT").as_(SOURCE_POSITION)
    if table.file_format == "fhir":
        # The FHIR reader gives each row its file and line, and its own problem with it.
        return fhir_source(table, source).subquery("r")
    if table.file_format == "parquet":
        return (
            exp.select(every, no_position)
            .from_(exp.Table(this=table_function(table)))
            .subquery("r")
        )
    parts = []
    for index, file in enumerate(table.files):
        number = exp.Window(this=exp.func("ROW_NUMBER"))
        position = exp.Add(this=exp.Literal.number(index * POSITION_BASE), expression=number)
        reader = exp.Table(this=table_function(table, (file,)))
        parts.append(exp.select(every.copy(), position.as_(SOURCE_POSITION)).from_(reader))
    union = parts[0]
    for part in parts[1:]:
        union = union.union(part, distinct=False)
    return union.subquery("r")


# DuckDB's CSV errors: "CSV Error on Line: N", "Original Line: ...", the reason, the options.
_CSV_LINE = re.compile(r"CSV Error on Line: (\d+)")
_CSV_TEXT = re.compile(r"^Original Line: (.*)$", re.MULTILINE)
_CSV_FILE = re.compile(r"^\s*file = (.+)$", re.MULTILINE)
_CSV_WIDTH = re.compile(r"Expected Number of Columns: (\d+) Found: (\d+)")
# What DuckDB's message says -> the error's code and our sentence.
_CSV_REASONS = {
    "Invalid unicode": ("csv-not-utf8", "not valid UTF-8 (convert the file to UTF-8)"),
    "Maximum line size": (
        "csv-line-too-long",
        "the line is longer than DuckDB's maximum line size",
    ),
    "unterminated quote": ("csv-unclosed-quote", "a quoted field is never closed"),
}


def read_failure(err: BaseException) -> ExtractError | None:
    """An extract file DuckDB could not read, as an error naming the file and the line.

    The error reads ``file:line [code] 'the line': why``, like a located configuration problem.
    DuckDB counts a record whose quoted fields hold line breaks as one line. Returns None when
    ``err`` is not a CSV reading error.
    """
    message = str(err)
    line, file = _CSV_LINE.search(message), _CSV_FILE.search(message)
    if not line or not file:
        return None
    width = _CSV_WIDTH.search(message)
    if width:
        expected, found = (int(n) for n in width.groups())
        side = "extra" if found > expected else "missing"
        column = min(expected, found) + 1
        code = "csv-ragged-row"
        reason = f"{found} fields where the header has {expected} ({side} from column {column})"
    else:
        known = (found for key, found in _CSV_REASONS.items() if key.lower() in message.lower())
        code, reason = next(known, ("csv-unreadable", "cannot be read as CSV"))
    text = _CSV_TEXT.search(message)
    shown = f"{text.group(1)[:60]!r}: " if text else ""
    where = f"{file.group(1).strip()}:{line.group(1)}"
    return ExtractError(f"{shown}{reason}", code=code, where=where)


def machine_memory_limit() -> str | None:
    """Half the machine's physical memory, in DuckDB's notation (``"11974MiB"``).

    DuckDB's own default is 80% of RAM, which leaves too little for the Arrow outputs, Python
    and the rest of a shared machine; half is the tool's default when neither ``--memory-limit``
    nor the study sets one. None where the platform does not report its memory (then DuckDB's
    default applies).
    """
    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (AttributeError, OSError, ValueError):
        return None
    return f"{total // 2 // 2**20}MiB" if total > 0 else None


def _create(kind: str, name: str, query: exp.Query) -> exp.Create:
    return exp.Create(
        this=exp.to_table(name),
        kind=kind,
        expression=query,
        properties=exp.Properties(expressions=[exp.TemporaryProperty()]),
    )


class DuckDBEngine(Engine[duckdb.DuckDBPyConnection]):
    """Execute plans on an embedded DuckDB database.

    Args:
        threads: Worker threads (DuckDB's default: all cores).
        memory_limit: e.g. ``"2GB"``; beyond it DuckDB spills to the scratch folder. None:
            half the machine's memory (:func:`machine_memory_limit`).
        memory_limit_from: Where ``memory_limit`` came from (``option`` or ``study``), for
            run.json; ``machine`` when it is None.
    """

    DIALECT = "duckdb"
    LABEL = "DuckDB"

    def __init__(
        self,
        *,
        threads: int | None = None,
        memory_limit: str | None = None,
        memory_limit_from: str = "option",
    ) -> None:
        self.threads = threads
        self.memory_limit = memory_limit or machine_memory_limit()
        self.memory_limit_from = memory_limit_from if memory_limit else "machine"

    @property
    def version(self) -> str:
        """DuckDB's version."""
        return str(duckdb.__version__)

    @contextmanager
    def _open(self) -> Iterator[duckdb.DuckDBPyConnection]:
        with tempfile.TemporaryDirectory(prefix="ascertain-scratch-") as scratch:
            con = self._connect(Path(scratch))
            try:
                yield con
            finally:
                con.close()

    def _connect(self, scratch: Path) -> duckdb.DuckDBPyConnection:
        """A connection spilling to ``scratch``, with the tool's settings and optimizers."""
        con = duckdb.connect(":memory:")
        con.execute("SET temp_directory = ?", [str(scratch)])
        optimizers = {row[0] for row in con.execute(_OPTIMIZERS).fetchall()}
        disabled = [name for name in _DISABLED_OPTIMIZERS if name in optimizers]
        if disabled:
            con.execute("SET disabled_optimizers = ?", [",".join(disabled)])
        con.execute("SET preserve_insertion_order = false")
        if self.threads:
            con.execute("SET threads = ?", [self.threads])
        if self.memory_limit:
            con.execute("SET memory_limit = ?", [self.memory_limit])
        # The profiler's figures are read after each stage (see _memory); no output is printed.
        con.execute("PRAGMA enable_profiling = 'no_output'")
        return con

    def _run_settings(self, conn: duckdb.DuckDBPyConnection) -> dict[str, Any]:
        """The memory limit in effect, as DuckDB states it, and where it came from."""
        limit = conn.sql("SELECT current_setting('memory_limit')").fetchall()[0][0]
        return {"memory_limit": str(limit), "memory_limit_from": self.memory_limit_from}

    def _memory(self, conn: duckdb.DuckDBPyConnection) -> int:
        """DuckDB's peak buffer memory during the last statement, else what it holds now."""
        try:
            profile = json.loads(conn.get_profiling_information(format="json"))
            return int(profile["system"]["peak_buffer_memory"])
        except (duckdb.Error, KeyError, TypeError, ValueError):
            rows = conn.sql("SELECT SUM(memory_usage_bytes) FROM duckdb_memory()").fetchall()
            return int(rows[0][0] or 0)

    def _table_rows(
        self,
        conn: duckdb.DuckDBPyConnection,
        table: ExtractTable,
        source: SourceTable | None = None,
    ) -> exp.Expression:
        return _rows(table, source)

    def _probe_rows(self, conn: duckdb.DuckDBPyConnection, table: ExtractTable) -> exp.Expression:
        # The plain reader: the probe needs no row positions.
        return exp.Table(this=table_function(table))

    def _column_type(
        self, conn: duckdb.DuckDBPyConnection, table: ExtractTable, column: exp.Expression
    ) -> str:
        describe = exp.Describe(this=exp.select(column).from_(self._probe_rows(conn, table)))
        rows = conn.execute(describe.sql(self.DIALECT)).fetchall()
        return str(rows[0][1]) if rows else self.TEXT_TYPE

    def _create_view(self, conn: duckdb.DuckDBPyConnection, name: str, query: exp.Query) -> None:
        conn.execute(_create("VIEW", name, query).sql(self.DIALECT))

    def _materialise(
        self, conn: duckdb.DuckDBPyConnection, stage: Stage
    ) -> tuple[int | None, int | None]:
        kind = "VIEW" if stage.kind == "view" else "TABLE"
        conn.execute(_create(kind, stage.name, stage.query).sql(self.DIALECT))
        memory = self._memory(conn)
        if stage.kind == "view":
            return None, memory
        count = exp.select(exp.func("COUNT", exp.Star())).from_(exp.to_table(stage.name))
        return int(conn.execute(count.sql(self.DIALECT)).fetchall()[0][0]), memory

    def _first_rows(
        self, conn: duckdb.DuckDBPyConnection, query: exp.Query, limit: int | None
    ) -> list[Any]:
        # Fetched completely before the next statement (DuckDB 2 requires it).
        if limit is not None:
            query = exp.select("*").from_(query.subquery("q")).limit(limit)
        return conn.execute(query.sql(self.DIALECT, pretty=True)).fetchall()

    def _fetch(
        self,
        conn: duckdb.DuckDBPyConnection,
        stage_name: str,
        order: Sequence[str],
        rows: int | None,
    ) -> pa.Table:
        # DuckDB sorts NULLs last by default, as the outputs are specified.
        select = exp.select("*").from_(stage_name)
        if order:
            select = select.order_by(*order)
        return conn.sql(select.sql(self.DIALECT)).to_arrow_table()

    def _fetch_batches(
        self,
        conn: duckdb.DuckDBPyConnection,
        stage_name: str,
        order: Sequence[str],
        rows: int | None,
    ) -> pa.RecordBatchReader:
        # The same query as _fetch, read batch by batch: DuckDB sorts inside its own memory
        # limit (spilling to disk if it must) and hands over FETCH_ROWS rows at a time. The
        # reader must be read to its end before the connection runs anything else.
        select = exp.select("*").from_(stage_name)
        if order:
            select = select.order_by(*order)
        return conn.sql(select.sql(self.DIALECT)).to_arrow_reader(FETCH_ROWS)

    def _is_own_error(self, err: BaseException) -> bool:
        return isinstance(err, duckdb.Error)

    def _read_failure(self, err: BaseException) -> ExtractError | None:
        return read_failure(err)
