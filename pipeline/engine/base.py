"""What every engine does the same way: bind the extract, run the stages, fetch the outputs.

An engine runs a :class:`~pipeline.compile.Plan`; it knows nothing about studies. The steps are
the same on every database, so they are written once, here, in :class:`Engine`:

1. bind each source table as a ``src_<table>`` view over its files: the plan's columns (a
   column the table lacks is NULL), ``patient_id`` typed as the patients file types it (see
   :meth:`Engine._id_type`), and the two columns every source carries, ``source_position`` and
   ``source_problem``; optionally restricted to some patients (a trace);
2. run the stages in plan order, timing each, asking the engine for its memory figure, calling
   the caller's progress callback first, and refusing the run when a ``check`` stage returns
   rows;
3. fetch each output sorted as the plan says, as an Arrow table.

A concrete engine fills in small hooks: how to open a connection, read one table's rows, create
a view or a stored table, fetch a few rows, fetch an output, and how to read its own errors.
Differences between engines that the shared code must know are declared as class attributes
(:attr:`Engine.READS_FHIR`, :attr:`Engine.CHECK_ROWS_SHOWN`, :attr:`Engine.TEXT_TYPE`) and read
here; nothing is declared that no code reads.
"""

from __future__ import annotations

import logging
import time
from abc import ABC, abstractmethod
from collections.abc import Callable, Mapping, Sequence
from contextlib import AbstractContextManager
from dataclasses import dataclass, field
from typing import Any, ClassVar, Generic, TypeVar

import pyarrow as pa
from sqlglot import exp

from pipeline.compile import SOURCE_POSITION, SOURCE_PROBLEM, Plan, SourceTable, Stage
from pipeline.errors import AscertainError, EngineError, ExtractError
from pipeline.extract import ExtractTable, source_column

log = logging.getLogger(__name__)

# An identifier in canonical integer form keeps its integer type; anything else stays text.
INTEGER_ID = r"^(0|-?[1-9][0-9]{0,17})$"


@dataclass(frozen=True)
class StageReport:
    """What one stage cost: seconds, the rows it produced (None for views) and memory.

    ``memory_bytes`` is the engine's own figure for the stage, where it has one (DuckDB: its
    profiler's peak buffer memory while the stage ran), so a stage whose memory grows shows in
    run.json. None on engines without such a figure.
    """

    name: str
    kind: str
    seconds: float
    rows: int | None
    memory_bytes: int | None = None


@dataclass
class RunResult:
    """The outputs of a plan, read back from the engine, and what each stage cost.

    ``engine`` and ``engine_version`` are set by :meth:`Engine.run` from the engine's declared
    name and its library's version, so every result says where it was computed.
    """

    outputs: dict[str, pa.Table]
    stages: list[StageReport]
    engine: str
    engine_version: str
    engine_info: dict[str, Any] = field(default_factory=dict)
    """Where and how it ran, when that can differ between runs (Spark: master, settings)."""
    run_settings: dict[str, Any] = field(default_factory=dict)
    """Settings that depend on the machine (DuckDB's memory limit and where it came from):
    for run.json only, so the manifest stays the same on every machine."""
    streamed: dict[str, int] = field(default_factory=dict)
    """Outputs handed to a sink batch by batch instead of held in ``outputs``: rows written."""


BatchSink = Callable[[pa.RecordBatchReader], int]
"""Takes one output's rows, sorted, as a stream of Arrow batches; returns the rows it kept.

Called while the engine's connection is open, so the output never needs to be held whole:
the sink writes each batch (a Parquet file, ``outputs._write.parquet_sink``) and lets it go.
"""

StageCallback = Callable[[Stage, int, int], None]
"""Called before each stage with the stage, its 1-based number and the number of stages."""

Connection = TypeVar("Connection")


def try_cast(node: exp.Expression, to: exp.DataType) -> exp.TryCast:
    """``TRY_CAST(node AS to)`` that stays TRY_CAST in every dialect.

    sqlglot renders a ``TryCast`` built without ``safe=True`` as a plain ``CAST`` for Spark,
    which with ANSI mode on fails on the first bad value where DuckDB returns NULL.
    """
    cast = exp.TryCast(this=node, to=to.copy())
    cast.set("safe", value=True)
    return cast


class Engine(ABC, Generic[Connection]):
    """Run plans; the shared steps live here, each engine fills in the hooks below.

    A run opens a connection (:meth:`_open`: a DuckDB connection, a Spark session), binds the
    sources, runs the stages and fetches the outputs inside it, and translates the engine's own
    errors into :class:`~pipeline.errors.ExtractError` (a file could not be read) or
    :class:`~pipeline.errors.EngineError`, each with a stable code.
    """

    DIALECT: ClassVar[str]
    """The engine's name and its sqlglot dialect (``duckdb``, ``spark``): ``RunResult.engine``."""
    LABEL: ClassVar[str]
    """The engine's name in messages (``DuckDB``)."""
    READS_FHIR: ClassVar[bool] = True
    """Whether the engine can read FHIR bulk exports; :meth:`run` refuses them otherwise."""
    CHECK_ROWS_SHOWN: ClassVar[int | None] = None
    """How many offending rows of a failed check the error shows (None: all of them)."""
    TEXT_TYPE: ClassVar[str] = "VARCHAR"
    """The engine's name for the text type, given to text identifiers."""

    @staticmethod
    def prepare(plan: Plan) -> Plan:
        """The plan exactly as this engine runs it (by default the stages as compiled)."""
        return plan

    @property
    @abstractmethod
    def version(self) -> str:
        """The version of the engine's library, for the manifest and run.json."""

    # -- hooks ---------------------------------------------------------------------------------

    @abstractmethod
    def _open(self) -> AbstractContextManager[Connection]:
        """A connection for one run, closed (and its scratch space removed) afterwards."""

    @abstractmethod
    def _table_rows(
        self, conn: Connection, table: ExtractTable, source: SourceTable | None = None
    ) -> exp.Expression:
        """One extract table's rows as a relation to select from, with ``source_position``.

        A FHIR table also carries ``source_problem``; its reader takes from ``source`` (the
        table as the plan reads it) the code systems and LOINC codes the study reads. Every
        CSV value is text.
        """

    def _probe_rows(self, conn: Connection, table: ExtractTable) -> exp.Expression:
        """The relation the patient id probe reads (by default :meth:`_table_rows`)."""
        return self._table_rows(conn, table)

    @abstractmethod
    def _column_type(self, conn: Connection, table: ExtractTable, column: exp.Expression) -> str:
        """The type a typed (Parquet) table gives ``column``, in the engine's words."""

    @abstractmethod
    def _create_view(self, conn: Connection, name: str, query: exp.Query) -> None:
        """Make ``query`` readable as ``name`` without computing it."""

    @abstractmethod
    def _materialise(self, conn: Connection, stage: Stage) -> tuple[int | None, int | None]:
        """Create a ``table`` or ``view`` stage; its rows (None for a view) and memory figure."""

    @abstractmethod
    def _first_rows(self, conn: Connection, query: exp.Query, limit: int | None) -> list[Any]:
        """Up to ``limit`` rows of ``query`` (all rows when None), as tuples."""

    @abstractmethod
    def _fetch(
        self, conn: Connection, stage_name: str, order: Sequence[str], rows: int | None
    ) -> pa.Table:
        """One output stage's rows sorted by ``order`` (NULLs last), as Arrow.

        ``rows`` is the stage's row count when it is a stored table, else None.
        """

    def _fetch_batches(
        self, conn: Connection, stage_name: str, order: Sequence[str], rows: int | None
    ) -> pa.RecordBatchReader:
        """A stage's rows sorted by ``order``, as a stream of batches of bounded size.

        The default fetches the whole table and hands it over in its own batches; an engine
        that can stream a query's result overrides it, so that a large output (person-time)
        is never held whole in Python.
        """
        table = self._fetch(conn, stage_name, order, rows)
        return pa.RecordBatchReader.from_batches(table.schema, table.to_batches())

    def _check_rows(self, conn: Connection, stage: Stage) -> list[Any]:
        """The offending rows a check stage finds: at most :attr:`CHECK_ROWS_SHOWN` of them."""
        return self._first_rows(conn, stage.query, self.CHECK_ROWS_SHOWN)

    def _memory(self, conn: Connection) -> int | None:
        """The engine's memory figure for the statement just run (None: it has none)."""
        return None

    def _engine_info(self, conn: Connection) -> dict[str, Any]:
        """Where and how the run went, for the manifest and run.json."""
        return {}

    def _run_settings(self, conn: Connection) -> dict[str, Any]:
        """Machine-dependent settings in effect, for run.json only."""
        return {}

    @abstractmethod
    def _is_own_error(self, err: BaseException) -> bool:
        """Whether ``err`` was raised by the engine's library (and should be translated)."""

    def _error_text(self, err: BaseException) -> str:
        """The engine error's text as shown to a user (by default the whole text)."""
        return str(err)

    def _read_failure(self, err: BaseException) -> ExtractError | None:
        """``err`` as an error naming the extract file it could not read, else None."""
        return None

    # -- the shared steps ----------------------------------------------------------------------

    def run(
        self,
        plan: Plan,
        tables: dict[str, ExtractTable],
        *,
        on_stage: StageCallback | None = None,
        patients: tuple[str, ...] | None = None,
        sinks: Mapping[str, BatchSink] | None = None,
    ) -> RunResult:
        """Run every stage of the plan and return its outputs, sorted as the plan says.

        ``patients`` restricts every source table to those patient ids (used to trace one).
        An output named in ``sinks`` is streamed to its sink in sorted batches (see
        :data:`BatchSink`) instead of being returned; ``RunResult.streamed`` has its rows.

        Raises:
            ExtractError: An extract file could not be read (named with its line, where the
                engine says it).
            EngineError: The engine cannot read a table's format, rejected a stage, or a check
                stage found offending rows (code ``data-check-failed``, naming the stage).
        """
        if not self.READS_FHIR:
            for table in tables.values():
                if table.file_format == "fhir":
                    raise EngineError(
                        f"the {self.LABEL} engine cannot read the FHIR export {table.name}; "
                        "use DuckDB",
                        code="fhir-unsupported",
                    )
        try:
            with self._open() as conn:
                self._bind_sources(conn, plan.sources, tables, patients)
                reports = self._run_stages(conn, plan, on_stage)
                rows = {report.name: report.rows for report in reports}
                outputs: dict[str, pa.Table] = {}
                streamed: dict[str, int] = {}
                for output, stage_name, order in plan.outputs:
                    if sinks and output in sinks:
                        batches = self._fetch_batches(conn, stage_name, order, rows.get(stage_name))
                        streamed[output] = sinks[output](batches)
                    else:
                        outputs[output] = self._fetch(conn, stage_name, order, rows.get(stage_name))
                return RunResult(
                    outputs,
                    reports,
                    engine=self.DIALECT,
                    engine_version=self.version,
                    engine_info=self._engine_info(conn),
                    run_settings=self._run_settings(conn),
                    streamed=streamed,
                )
        except AscertainError:
            raise
        except Exception as err:
            if not self._is_own_error(err):
                raise
            failure = EngineError(
                f"{self.LABEL} failed: {self._error_text(err)}", code="engine-failed"
            )
            raise self._read_failure(err) or failure from err

    def _bind_sources(
        self,
        conn: Connection,
        sources: tuple[SourceTable, ...],
        tables: dict[str, ExtractTable],
        patients: tuple[str, ...] | None,
    ) -> None:
        """Bind the sources, an engine error while doing so being a failure to read them."""
        try:
            self._bind(conn, sources, tables, patients)
        except AscertainError:
            raise
        except Exception as err:
            if not self._is_own_error(err):
                raise
            failure = ExtractError(
                f"{self.LABEL} could not read the extract: {self._error_text(err)}",
                code="extract-unreadable",
            )
            raise self._read_failure(err) or failure from err

    def _id_type(self, conn: Connection, patients: ExtractTable) -> str:
        """The type patient_id gets in every table: the patients file's own type.

        CSV has no types, so a CSV column of canonical integers is read as BIGINT (sorting 9
        before 10) and anything else as text. FHIR resource ids are text.
        """
        if patients.file_format == "fhir":
            return self.TEXT_TYPE
        column = source_column(patients, "patient_id")
        if patients.file_format == "parquet":
            return self._column_type(conn, patients, column)
        match = exp.func("REGEXP_FULL_MATCH", column, exp.Literal.string(INTEGER_ID))
        probe = exp.select(exp.func("BOOL_AND", match)).from_(self._probe_rows(conn, patients))
        rows = self._first_rows(conn, probe, None)
        return "BIGINT" if rows and rows[0][0] else self.TEXT_TYPE

    def _bind(
        self,
        conn: Connection,
        sources: tuple[SourceTable, ...],
        tables: dict[str, ExtractTable],
        patients: tuple[str, ...] | None = None,
    ) -> None:
        """Create a ``src_<table>`` view for each source, in the canonical columns only."""
        if not sources:
            return
        id_type = exp.DataType.build(self._id_type(conn, tables["patients"]), dialect=self.DIALECT)
        for source in sources:
            table = tables[source.name]
            columns: list[exp.Expression] = []
            for name in source.columns:
                if name not in table.provides:
                    columns.append(exp.cast(exp.null(), "VARCHAR").as_(name))
                elif name == "patient_id":
                    columns.append(try_cast(source_column(table, name), id_type).as_(name))
                else:
                    columns.append(source_column(table, name).as_(name))
            # The FHIR reader sets rows aside itself; no other reader does.
            problem = (
                exp.column(SOURCE_PROBLEM)
                if table.file_format == "fhir"
                else exp.cast(exp.null(), "VARCHAR").as_(SOURCE_PROBLEM)
            )
            rows = self._table_rows(conn, table, source)
            view = exp.select(*columns, exp.column(SOURCE_POSITION), problem).from_(rows)
            if patients is not None:
                # Restrict every table to some patients (a trace); ids compared as typed values.
                wanted = [try_cast(exp.Literal.string(p), id_type) for p in patients]
                typed = try_cast(exp.column("patient_id"), id_type)
                view = exp.select("*").from_(view.subquery("v")).where(typed.isin(*wanted))
            self._create_view(conn, source.relation, view)

    def _run_stages(
        self, conn: Connection, plan: Plan, on_stage: StageCallback | None
    ) -> list[StageReport]:
        """Run the stages in order; what each cost."""
        reports: list[StageReport] = []
        for number, stage in enumerate(plan.stages, start=1):
            if on_stage:
                on_stage(stage, number, len(plan.stages))
            started = time.perf_counter()
            try:
                rows, memory = self._execute(conn, stage)
            except AscertainError:
                raise
            except Exception as err:
                if not self._is_own_error(err):
                    raise
                failure = EngineError(
                    f"failed on {self.LABEL}: {self._error_text(err)}",
                    code="stage-failed",
                    where=f"stage {stage.name}",
                )
                raise self._read_failure(err) or failure from err
            seconds = time.perf_counter() - started
            reports.append(StageReport(stage.name, stage.kind, seconds, rows, memory))
            log.debug("stage %s: %.3fs, %s rows", stage.name, seconds, rows)
        return reports

    def _execute(self, conn: Connection, stage: Stage) -> tuple[int | None, int | None]:
        """Run one stage: its rows (None for a view, 0 for a passed check) and memory figure.

        Raises:
            EngineError: ``[data-check-failed]`` when a check stage returns rows.
        """
        if stage.kind != "check":
            return self._materialise(conn, stage)
        rows = self._check_rows(conn, stage)
        if rows:
            raise EngineError(
                f"{stage.failure} (first rows: {shown_rows(rows)})",
                code="data-check-failed",
                where=f"stage {stage.name}",
            )
        return 0, self._memory(conn)


def shown_rows(rows: Sequence[Sequence[Any]]) -> str:
    """Rows as one line of text for an error: values comma-separated, rows by semicolons."""
    return "; ".join(", ".join(str(v) for v in row) for row in rows)
