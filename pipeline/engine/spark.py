"""Run a plan on Spark: the same stages, rewritten where Spark SQL means something else.

The rewrite rules live in :mod:`pipeline.engine._spark_sql`; this module binds the extract
files as ``src_<table>`` views, runs the stages and fetches the outputs as Arrow. pyspark is
imported only inside its functions: ``pip install ascertain[spark]`` is needed only to run.
"""

from __future__ import annotations

import logging
import re
import time
from collections.abc import Iterator
from contextlib import contextmanager
from typing import TYPE_CHECKING, Any

from sqlglot import exp

from pipeline.compile import (
    POSITION_BASE,
    SOURCE_POSITION,
    SOURCE_PROBLEM,
    Plan,
    SourceTable,
    Stage,
)
from pipeline.engine._duckdb import _INTEGER_ID, RunResult, StageCallback, StageReport
from pipeline.engine._mapped import source_column
from pipeline.engine._spark_fetch import to_arrow
from pipeline.engine._spark_session import (
    DEFAULT_CONNECT_TIMEOUT,
    DEFAULT_MASTER,
    SessionRequest,
    safe_master,
    settings_in_effect,
    start_session,
    user_settings,
)
from pipeline.engine._spark_sql import spark_plan, spark_query, try_cast
from pipeline.errors import EngineError, ExtractError
from pipeline.extract import ExtractTable

if TYPE_CHECKING:  # pragma: no cover
    from pyspark.sql import DataFrame, SparkSession

log = logging.getLogger(__name__)

# Where each ``table`` stage is kept: ``local_checkpoint`` (fastest; on the executors' local
# disks, so a lost executor fails the build), ``checkpoint`` (written to a folder every machine
# shares, survives a lost executor) or ``cache`` (memory and disk, recomputed from its lineage
# when an executor is lost; later stages are planned over the whole lineage, which is slower).
STAGE_STORAGE = ("local_checkpoint", "checkpoint", "cache")

# -- the engine --------------------------------------------------------------------------------


def _spark_error(err: BaseException) -> bool:
    try:
        from py4j.protocol import Py4JJavaError
        from pyspark.errors import PySparkException
    except ImportError:  # pragma: no cover
        return False
    return isinstance(err, PySparkException | Py4JJavaError)


# Spark's errors: "[ERROR_CLASS] message", the file being read, the CSV record it refused.
_ERROR_CLASS = re.compile(r"(\[[A-Z_.]+\] [^\n]*)")
_READ_FILE = re.compile(r"while reading file (?:file://)?(\S+?)\.?(?:\s|$)")
_MALFORMED = re.compile(r"Malformed CSV record: (.*?)(?: SQLSTATE|$)", re.MULTILINE)


def _first_line(err: BaseException) -> str:
    """The most telling line of a Spark error: its error class and message, else its first."""
    text = str(err)
    found = _ERROR_CLASS.search(text)
    if found:
        return found.group(1).split(" SQLSTATE")[0].strip()
    lines = text.strip().splitlines()
    return lines[0] if lines else type(err).__name__


def _read_failure(err: BaseException) -> ExtractError | None:
    """An extract file Spark could not read, as an error naming the file (Spark gives no line).

    Returns None when ``err`` is not a failure to read a file.
    """
    text = str(err)
    file = _READ_FILE.search(text)
    if not file:
        return None
    record = _MALFORMED.search(text)
    if record:
        shown = record.group(1).strip()[:60]
        return ExtractError(
            f"{file.group(1)}: row {shown!r} has more or fewer fields than the header"
        )
    return ExtractError(f"{file.group(1)}: cannot be read: {_first_line(err)}")


class SparkEngine:
    """Execute plans on Spark, ``local[*]`` by default or any cluster by its master URL.

    A session is created for each run (see :mod:`pipeline.engine._spark_session` for its
    settings and the bounded wait for the master) and stopped after it, unless one is passed
    in or already running: then each run works in a fresh ``newSession()`` of it (own temporary
    views, own SQL settings) and the session is left running (used by tests).

    Args:
        master: Spark master URL, e.g. ``local[*]`` or ``spark://host:7077``.
        conf: The user's Spark settings (the study's, the command line's over them).
        session: An existing SparkSession to reuse.
        connect_timeout: Seconds the master gets to accept the application.
        stage_storage: How table stages are kept, one of :data:`STAGE_STORAGE`.
        checkpoint_folder: For ``checkpoint``: a folder (URI) every machine of the cluster
            reaches; the run writes a subfolder there and removes it afterwards.
    """

    DIALECT = "spark"

    @staticmethod
    def prepare(plan: Plan) -> Plan:
        """The plan exactly as this engine runs it: every stage through the Spark rewrites."""
        return spark_plan(plan)

    # Declared differences that compile could read (habit 5); none needs a compile change yet.
    SUPPORTS_QUALIFY = False
    NULLS_FIRST_BY_DEFAULT = True  # sqlglot writes NULLS LAST wherever DuckDB's default matters
    STRICT_CSV_WIDTH = True  # ragged CSV rows fail the read (FAILFAST), as on DuckDB
    READS_FHIR = False  # FHIR bulk exports are read by the DuckDB engine only
    # ROUND(double, d) rounds the shortest decimal text of the double (Double.toString) half
    # up; DuckDB rounds its exact binary value. They differ at apparent ties (0.0055 -> 0.006
    # here, 0.005 there), and Java's POW may differ from C's by one ulp. No SQL rule fixes
    # this; compile should not ROUND doubles to near full precision when this flag is False.
    ROUNDS_LIKE_DUCKDB = False

    def __init__(
        self,
        master: str = DEFAULT_MASTER,
        *,
        conf: dict[str, str] | None = None,
        session: SparkSession | None = None,
        connect_timeout: float = DEFAULT_CONNECT_TIMEOUT,
        stage_storage: str = "local_checkpoint",
        checkpoint_folder: str | None = None,
    ) -> None:
        if stage_storage not in STAGE_STORAGE:
            raise EngineError(
                f"Spark stage storage must be one of {', '.join(STAGE_STORAGE)}, "
                f"not '{stage_storage}'"
            )
        if (stage_storage == "checkpoint") != (checkpoint_folder is not None):
            raise EngineError("Spark stage storage 'checkpoint' goes with a checkpoint folder")
        self.request = SessionRequest(master, dict(conf or {}), connect_timeout)
        self.session = session
        self.stage_storage = stage_storage
        self.checkpoint_folder = checkpoint_folder

    @property
    def master(self) -> str:
        """The master URL this engine connects to when it starts its own session."""
        return self.request.master

    @staticmethod
    def create_session(master: str = DEFAULT_MASTER, conf: dict[str, str] | None = None) -> Any:
        """A new SparkSession with the tool's settings and ``conf`` (see ``_spark_session``).

        Raises:
            EngineError: pyspark is missing, or the master cannot be reached.
        """
        request = SessionRequest(master, dict(conf or {}))
        session = start_session(request, request.passed(user_settings()))
        # Spark logs every failed query as a page of JSON; the engine reports it as one line.
        session.sparkContext.setLogLevel("FATAL")
        return session

    @contextmanager
    def started(self) -> Iterator[SparkSession]:
        """A session kept up for this engine's next runs, e.g. to read the extract beforehand.

        Used to list and hash an extract on a Hadoop file system through the session's file
        systems before the run; :meth:`run` then works in a ``newSession()`` of it. A session
        passed in or already running is used as it is and left running.

        Raises:
            EngineError: pyspark is missing, or the master cannot be reached.
        """
        from pyspark.sql import SparkSession

        shared = self.session or SparkSession.getActiveSession()
        if shared is not None:
            yield shared
            return
        spark = start_session(self.request, self.request.passed(user_settings()))
        spark.sparkContext.setLogLevel("FATAL")
        self.session = spark
        try:
            yield spark
        finally:
            self.session = None
            spark.stop()

    @contextmanager
    def _session(self) -> Iterator[tuple[SparkSession, dict[str, Any]]]:
        """A session for one run, with what it runs on: master and settings in effect."""
        from pyspark.sql import SparkSession

        user = user_settings()
        watched = self.request.watched(user)
        # A session passed in, or one already running in this process (a notebook, a test
        # module), is shared: the run gets its own newSession() and leaves the shared one up.
        shared = self.session or SparkSession.getActiveSession()
        if shared is None:
            spark = start_session(self.request, self.request.passed(user))
            spark.sparkContext.setLogLevel("FATAL")
            try:
                with self._storage(spark):
                    yield spark, self._describe(spark, watched)
            finally:
                spark.stop()
            return
        spark = shared.newSession()
        for key, value in self.request.passed(user).items():
            if key.startswith("spark.sql."):
                spark.conf.set(key, value)
        try:
            with self._storage(spark):
                yield spark, self._describe(spark, watched)
        finally:
            spark.catalog.clearCache()

    def _describe(self, spark: SparkSession, watched: list[str]) -> dict[str, Any]:
        info: dict[str, Any] = {
            "master": safe_master(spark.sparkContext.master),
            "settings": settings_in_effect(spark, watched),
            "stage_storage": self.stage_storage,
        }
        return info

    @contextmanager
    def _storage(self, spark: SparkSession) -> Iterator[None]:
        """Set the checkpoint folder for reliable checkpoints; remove this run's part after."""
        if self.stage_storage != "checkpoint" or self.checkpoint_folder is None:
            yield
            return
        context = spark.sparkContext
        try:
            context.setCheckpointDir(self.checkpoint_folder)
        except Exception as err:
            if _spark_error(err):
                raise EngineError(
                    f"the checkpoint folder {self.checkpoint_folder} cannot be used: "
                    f"{_first_line(err)}"
                ) from err
            raise
        # Spark made a fresh subfolder (a random name) for this context: ours to remove.
        made = context.getCheckpointDir()
        try:
            yield
        finally:
            if made:
                jvm = context._jvm
                path = jvm.org.apache.hadoop.fs.Path(made)
                path.getFileSystem(context._jsc.hadoopConfiguration()).delete(path, True)  # noqa: FBT003 (Java: recursive)

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
            EngineError: Spark rejected a stage or a check stage found offending rows.
            ExtractError: An extract file could not be read.
        """
        for table in tables.values():
            if table.file_format == "fhir" and not self.READS_FHIR:
                raise EngineError(
                    f"the Spark engine cannot read the FHIR export {table.name}; use DuckDB"
                )
        with self._session() as (spark, info):
            import pyspark

            try:
                result = self._run(spark, plan, tables, on_stage, patients)
                result.engine_info = info
            except (ExtractError, EngineError):
                raise
            except Exception as err:
                if _spark_error(err):
                    raise EngineError(f"Spark failed: {_first_line(err)}") from err
                raise
            result.engine, result.engine_version = "spark", pyspark.__version__
            return result

    # -- binding sources -----------------------------------------------------------------------

    def _read(self, spark: SparkSession, table: ExtractTable) -> DataFrame:
        """One extract table's files as a DataFrame, every CSV value as text.

        CSV is read as on DuckDB as far as Spark allows: the header skipped (its names as
        discovery read them, in file order), every column a string, nothing inferred, fields
        quoted with ``"`` (``""`` is a quote, line breaks allowed), UTF-8, and FAILFAST so a
        row with too few or too many fields fails the read instead of being padded or cut.
        Empty fields are NULL, as on DuckDB.

        Each row gets its position as on DuckDB (see SOURCE_POSITION): every CSV file is read
        on its own (``multiLine`` keeps a file in one partition, in file order) and numbered in
        the order of ``monotonically_increasing_id``: one sort in a single partition per file,
        affordable because large extracts arrive as Parquet, which has no positions.
        """
        from pyspark.sql import Window
        from pyspark.sql import functions as F

        if table.file_format == "parquet":
            frame = spark.read.parquet(*(str(f) for f in table.files))
            return frame.withColumn(SOURCE_POSITION, F.lit(None).cast("bigint"))
        parts = []
        for index, file in enumerate(table.files):
            order = Window.orderBy(F.monotonically_increasing_id())
            number = F.row_number().over(order) + F.lit(index * POSITION_BASE)
            parts.append(
                self._read_csv(spark, table, str(file)).withColumn(SOURCE_POSITION, number)
            )
        union = parts[0]
        for part in parts[1:]:
            union = union.unionByName(part)
        return union

    @staticmethod
    def _read_csv(spark: SparkSession, table: ExtractTable, path: str) -> DataFrame:
        from pyspark.sql.types import StringType, StructField, StructType

        names = [
            name if name and name not in table.columns[:i] else f"column{i + 1}"
            for i, name in enumerate(table.columns)
        ]
        schema = StructType([StructField(n, StringType(), nullable=True) for n in names])
        return spark.read.csv(
            path,
            schema=schema,
            header=True,
            enforceSchema=True,
            sep=",",
            quote='"',
            escape='"',
            encoding="UTF-8",
            multiLine=True,
            mode="FAILFAST",
            ignoreLeadingWhiteSpace=False,
            ignoreTrailingWhiteSpace=False,
            nullValue="",
        )

    def _id_type(self, spark: SparkSession, patients: DataFrame, table: ExtractTable) -> str:
        """The type patient_id gets in every table, as on DuckDB: the patients file's own type.

        CSV ids all in canonical integer form are BIGINT (sorting 9 before 10), others text.
        """
        column = source_column(table, "patient_id")
        if table.file_format == "parquet":
            typed = patients.selectExpr(column.sql(self.DIALECT))
            return str(typed.schema.fields[0].dataType.simpleString())
        match = exp.RegexpLike(this=column, expression=exp.Literal.string(_INTEGER_ID))
        probe = exp.select(exp.func("BOOL_AND", match)).from_("src_patients_raw")
        patients.createOrReplaceTempView("src_patients_raw")
        rows = spark.sql(probe.sql(self.DIALECT)).collect()
        return "BIGINT" if rows and rows[0][0] else "STRING"

    def _bind(
        self,
        spark: SparkSession,
        sources: tuple[SourceTable, ...],
        tables: dict[str, ExtractTable],
        patients: tuple[str, ...] | None,
    ) -> None:
        if not sources:
            return
        frames = {name: self._read(spark, table) for name, table in tables.items()}
        id_type = exp.DataType.build(
            self._id_type(spark, frames["patients"], tables["patients"]), dialect=self.DIALECT
        )
        for source in sources:
            table = tables[source.name]
            raw = f"{source.relation}_raw"
            frames[source.name].createOrReplaceTempView(raw)
            columns: list[exp.Expression] = []
            for name in source.columns:
                if name not in table.provides:
                    columns.append(exp.cast(exp.null(), "VARCHAR").as_(name))
                elif name == "patient_id":
                    column = source_column(table, name)
                    columns.append(try_cast(column, id_type).as_(name))
                else:
                    columns.append(source_column(table, name).as_(name))
            # Spark reads no FHIR, the one reader that sets rows aside itself.
            problem = exp.cast(exp.null(), "VARCHAR").as_(SOURCE_PROBLEM)
            view = exp.select(*columns, exp.column(SOURCE_POSITION), problem).from_(raw)
            if patients is not None:
                wanted = [try_cast(exp.Literal.string(p), id_type) for p in patients]
                typed = try_cast(exp.column("patient_id"), id_type)
                view = exp.select("*").from_(view.subquery("v")).where(typed.isin(*wanted))
            spark.sql(spark_query(view).sql(self.DIALECT)).createOrReplaceTempView(source.relation)

    # -- running stages ------------------------------------------------------------------------

    def _execute(self, spark: SparkSession, stage: Stage) -> int | None:
        frame = spark.sql(spark_query(stage.query).sql(self.DIALECT))
        if stage.kind == "check":
            rows = frame.limit(5).collect()
            if rows:
                shown = "; ".join(", ".join(str(v) for v in row) for row in rows)
                raise EngineError(f"{stage.failure} (stage {stage.name}; first rows: {shown})")
            return 0
        if stage.kind == "view":
            frame.createOrReplaceTempView(stage.name)
            return None
        # A checkpoint computes the table once and cuts its lineage, so later stages read it as
        # a scan rather than re-planning (and re-rendering) everything upstream. A local one
        # lives on the executors' disks; a reliable one in the shared folder; a cached one is
        # recomputed from its lineage where an executor was lost.
        if self.stage_storage == "local_checkpoint":
            frame = frame.localCheckpoint(eager=True)
        elif self.stage_storage == "checkpoint":
            frame = frame.checkpoint(eager=True)
        else:
            from pyspark import StorageLevel

            frame = frame.persist(StorageLevel.MEMORY_AND_DISK)
        count = frame.count()
        frame.createOrReplaceTempView(stage.name)
        return int(count)

    def _run(
        self,
        spark: SparkSession,
        plan: Plan,
        tables: dict[str, ExtractTable],
        on_stage: StageCallback | None,
        patients: tuple[str, ...] | None,
    ) -> RunResult:
        try:
            self._bind(spark, plan.sources, tables, patients)
        except Exception as err:
            if _spark_error(err):
                raise ExtractError(f"Spark could not read the extract: {_first_line(err)}") from err
            raise
        reports: list[StageReport] = []
        for number, stage in enumerate(plan.stages, start=1):
            if on_stage:
                on_stage(stage, number, len(plan.stages))
            started = time.perf_counter()
            try:
                rows = self._execute(spark, stage)
            except EngineError:
                raise
            except Exception as err:
                if _spark_error(err):
                    message = f"stage {stage.name} failed on Spark: {_first_line(err)}"
                    raise _read_failure(err) or EngineError(message) from err
                raise
            reports.append(StageReport(stage.name, stage.kind, time.perf_counter() - started, rows))
            log.debug("stage %s: %.3fs, %s rows", stage.name, reports[-1].seconds, rows)
        counted = {report.name: report.rows for report in reports}
        outputs = {}
        for output, stage_name, order in plan.outputs:
            # Sorted as DuckDB sorts (NULLs last), in partitions of bounded size.
            frame = spark.table(stage_name)
            outputs[output] = to_arrow(frame, order, counted.get(stage_name))
        return RunResult(outputs, reports)
