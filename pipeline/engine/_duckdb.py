"""Run a plan on DuckDB, embedded, with a scratch folder for spilling.

The engine binds each source table to a view over its files, renders every stage to DuckDB SQL
and executes the stages in order. It knows nothing about studies: only plans.
"""

from __future__ import annotations

import json
import logging
import os
import re
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import pyarrow as pa
from sqlglot import exp

from pipeline.compile import Plan, Stage
from pipeline.errors import EngineError, ExtractError
from pipeline.extract import ExtractTable, fhir_source, source_column
from pipeline.extract import table_function as _reader
from pipeline.extract.schema import POSITION_BASE, SOURCE_POSITION, SOURCE_PROBLEM, SourceTable

log = logging.getLogger(__name__)

# An identifier in canonical integer form keeps its integer type; anything else stays text.
_INTEGER_ID = r"^(0|-?[1-9][0-9]{0,17})$"


@dataclass(frozen=True)
class StageReport:
    """What one stage cost: seconds, the rows it produced (None for views) and memory.

    ``memory_bytes`` is DuckDB's own peak buffer memory while the stage ran (its profiler's
    ``peak_buffer_memory``; where this DuckDB has no such figure, the memory it holds after the
    stage), so a stage whose memory grows shows in run.json. None on other engines.
    """

    name: str
    kind: str
    seconds: float
    rows: int | None
    memory_bytes: int | None = None


@dataclass
class RunResult:
    """The outputs of a plan, read back from the engine, and what each stage cost."""

    outputs: dict[str, pa.Table]
    stages: list[StageReport] = field(default_factory=list)
    engine: str = "duckdb"
    engine_version: str = duckdb.__version__
    engine_info: dict[str, Any] = field(default_factory=dict)
    """Where and how it ran, when that can differ between runs (Spark: master, settings)."""
    run_settings: dict[str, Any] = field(default_factory=dict)
    """Settings that depend on the machine (DuckDB's memory limit and where it came from):
    for run.json only, so the manifest stays the same on every machine."""


StageCallback = Callable[[Stage, int, int], None]


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


def _rows(table: ExtractTable, source: SourceTable) -> exp.Expression:
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
        return exp.select(every, no_position).from_(exp.Table(this=_reader(table))).subquery("r")
    parts = []
    for index, file in enumerate(table.files):
        number = exp.Window(this=exp.func("ROW_NUMBER"))
        position = exp.Add(this=exp.Literal.number(index * POSITION_BASE), expression=number)
        reader = exp.Table(this=_reader(table, (file,)))
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
_CSV_REASONS = {
    "Invalid unicode": "not valid UTF-8 (convert the file to UTF-8)",
    "Maximum line size": "the line is longer than DuckDB's maximum line size",
    "unterminated quote": "a quoted field is never closed",
}


def _read_failure(err: duckdb.Error) -> ExtractError | None:
    """An extract file DuckDB could not read, as an error naming the file and the line.

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
        where = "extra" if found > expected else "missing"
        column = min(expected, found) + 1
        reason = f"{found} fields where the header has {expected} ({where} from column {column})"
    else:
        known = (text for key, text in _CSV_REASONS.items() if key.lower() in message.lower())
        reason = next(known, "cannot be read as CSV")
    text = _CSV_TEXT.search(message)
    shown = f" {text.group(1)[:60]!r}" if text else ""
    return ExtractError(f"{file.group(1).strip()}: line {line.group(1)}{shown}: {reason}")


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


class DuckDBEngine:
    """Execute plans on an embedded DuckDB database.

    Args:
        threads: Worker threads (DuckDB's default: all cores).
        memory_limit: e.g. ``"2GB"``; beyond it DuckDB spills to the scratch folder. None:
            half the machine's memory (:func:`machine_memory_limit`).
        memory_limit_from: Where ``memory_limit`` came from (``option`` or ``study``), for
            run.json; ``machine`` when it is None.
    """

    DIALECT = "duckdb"

    @staticmethod
    def prepare(plan: Plan) -> Plan:
        """The plan exactly as this engine runs it (DuckDB runs the stages as compiled)."""
        return plan

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

    def _connect(self, scratch: Path) -> duckdb.DuckDBPyConnection:
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

    def _settings(self, con: duckdb.DuckDBPyConnection) -> dict[str, Any]:
        """The memory limit in effect, as DuckDB states it, and where it came from."""
        limit = con.sql("SELECT current_setting('memory_limit')").fetchall()[0][0]
        return {"memory_limit": str(limit), "memory_limit_from": self.memory_limit_from}

    @staticmethod
    def _memory(con: duckdb.DuckDBPyConnection) -> int:
        """DuckDB's peak buffer memory during the last statement, else what it holds now."""
        try:
            profile = json.loads(con.get_profiling_information(format="json"))
            return int(profile["system"]["peak_buffer_memory"])
        except (duckdb.Error, KeyError, TypeError, ValueError):
            rows = con.sql("SELECT SUM(memory_usage_bytes) FROM duckdb_memory()").fetchall()
            return int(rows[0][0] or 0)

    def _id_type(self, con: duckdb.DuckDBPyConnection, patients: ExtractTable) -> str:
        """The type patient_id gets in every table: the patients file's own type.

        CSV has no types, so a CSV column of canonical integers is read as BIGINT (sorting 9
        before 10) and anything else as text. FHIR resource ids are text.
        """
        if patients.file_format == "fhir":
            return "VARCHAR"
        source = exp.Table(this=_reader(patients))
        if patients.file_format == "parquet":
            describe = exp.Describe(
                this=exp.select(source_column(patients, "patient_id")).from_(source)
            )
            rows = con.execute(describe.sql(self.DIALECT)).fetchall()
            return str(rows[0][1]) if rows else "VARCHAR"
        match = exp.func(
            "REGEXP_FULL_MATCH",
            source_column(patients, "patient_id"),
            exp.Literal.string(_INTEGER_ID),
        )
        probe = exp.select(exp.func("BOOL_AND", match)).from_(source)
        rows = con.execute(probe.sql(self.DIALECT)).fetchall()
        return "BIGINT" if rows and rows[0][0] else "VARCHAR"

    def _bind(
        self,
        con: duckdb.DuckDBPyConnection,
        sources: tuple[SourceTable, ...],
        tables: dict[str, ExtractTable],
        patients: tuple[str, ...] | None = None,
    ) -> None:
        id_type = exp.DataType.build(self._id_type(con, tables["patients"]), dialect=self.DIALECT)
        for source in sources:
            table = tables[source.name]
            columns: list[exp.Expression] = []
            for name in source.columns:
                if name not in table.provides:
                    columns.append(exp.cast(exp.null(), "VARCHAR").as_(name))
                elif name == "patient_id":
                    column = source_column(table, name)
                    columns.append(exp.TryCast(this=column, to=id_type.copy()).as_(name))
                else:
                    columns.append(source_column(table, name).as_(name))
            rows = _rows(table, source)
            problem = (
                exp.column(SOURCE_PROBLEM)
                if table.file_format == "fhir"
                else exp.cast(exp.null(), "VARCHAR").as_(SOURCE_PROBLEM)
            )
            view = exp.select(*columns, exp.column(SOURCE_POSITION), problem).from_(rows)
            if patients is not None:
                # Restrict every table to some patients (a trace); ids compared as typed values.
                wanted = [
                    exp.TryCast(this=exp.Literal.string(p), to=id_type.copy()) for p in patients
                ]
                typed = exp.TryCast(this=exp.column("patient_id"), to=id_type.copy())
                view = view.where(typed.isin(*wanted))
            con.execute(_create("VIEW", source.relation, view).sql(self.DIALECT))

    def _execute(self, con: duckdb.DuckDBPyConnection, stage: Stage) -> tuple[int | None, int]:
        """Run one stage: its rows (None for a view) and DuckDB's peak memory while it ran."""
        if stage.kind == "check":
            rows = con.execute(stage.render(self.DIALECT)).fetchall()
            if rows:
                shown = "; ".join(", ".join(str(v) for v in row) for row in rows)
                raise EngineError(f"{stage.failure} (stage {stage.name}; first rows: {shown})")
            return 0, self._memory(con)
        kind = "VIEW" if stage.kind == "view" else "TABLE"
        con.execute(_create(kind, stage.name, stage.query).sql(self.DIALECT))
        memory = self._memory(con)
        if stage.kind == "view":
            return None, memory
        count = exp.select(exp.func("COUNT", exp.Star())).from_(exp.to_table(stage.name))
        return int(con.execute(count.sql(self.DIALECT)).fetchall()[0][0]), memory

    def run(
        self,
        plan: Plan,
        tables: dict[str, ExtractTable],
        *,
        on_stage: StageCallback | None = None,
        patients: tuple[str, ...] | None = None,
    ) -> RunResult:
        """Run every stage of the plan and return its outputs, sorted as the plan says.

        ``patients`` restricts every source table to those patient ids (used to trace one).

        Raises:
            EngineError: DuckDB rejected a stage or a check stage found offending rows.
        """
        with tempfile.TemporaryDirectory(prefix="ascertain-scratch-") as scratch:
            con = self._connect(Path(scratch))
            try:
                return self._run(con, plan, tables, on_stage, patients)
            except duckdb.Error as err:
                raise _read_failure(err) or EngineError(f"DuckDB failed: {err}") from err
            finally:
                con.close()

    def _run(
        self,
        con: duckdb.DuckDBPyConnection,
        plan: Plan,
        tables: dict[str, ExtractTable],
        on_stage: StageCallback | None,
        patients: tuple[str, ...] | None,
    ) -> RunResult:
        self._bind(con, plan.sources, tables, patients)
        reports: list[StageReport] = []
        for number, stage in enumerate(plan.stages, start=1):
            if on_stage:
                on_stage(stage, number, len(plan.stages))
            started = time.perf_counter()
            try:
                rows, memory = self._execute(con, stage)
            except duckdb.Error as err:
                failure = EngineError(f"stage {stage.name} failed on DuckDB: {err}")
                raise _read_failure(err) or failure from err
            seconds = time.perf_counter() - started
            reports.append(StageReport(stage.name, stage.kind, seconds, rows, memory))
            log.debug("stage %s: %.3fs, %s rows", stage.name, reports[-1].seconds, rows)
        outputs = {}
        for output, stage_name, order in plan.outputs:
            select = exp.select("*").from_(stage_name)
            if order:
                select = select.order_by(*order)
            outputs[output] = con.sql(select.sql(self.DIALECT)).to_arrow_table()
        return RunResult(outputs, reports, run_settings=self._settings(con))
