"""Run a plan on Spark: the same stages, rewritten where Spark SQL means something else.

The steps every engine shares (binding, the stage loop, fetching) are in
:mod:`pipeline.engine.base`; the rewrite rules in :mod:`pipeline.engine.spark_rewrites`. This
module says how Spark reads the extract files, keeps each table stage, fetches the outputs as
Arrow, and how its errors name a file. pyspark is imported only inside its functions:
``pip install ascertain[spark]`` is needed only to run.
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from typing import TYPE_CHECKING, Any

import pyarrow as pa
from sqlglot import exp

from pipeline.compile import Plan, Stage
from pipeline.engine._spark_fetch import to_arrow, to_arrow_reader
from pipeline.engine._spark_session import (
    DEFAULT_CONNECT_TIMEOUT,
    DEFAULT_MASTER,
    SessionRequest,
    safe_master,
    settings_in_effect,
    start_session,
    user_settings,
)
from pipeline.engine.base import Engine
from pipeline.engine.spark_rewrites import spark_plan, spark_query
from pipeline.errors import EngineError, ExtractError
from pipeline.extract import ExtractTable
from pipeline.extract.schema import POSITION_BASE, SOURCE_POSITION, SourceTable

if TYPE_CHECKING:  # pragma: no cover
    from pyspark.sql import DataFrame, SparkSession

# Where each ``table`` stage is kept: ``local_checkpoint`` (fastest; on the executors' local
# disks, so a lost executor fails the build), ``checkpoint`` (written to a folder every machine
# shares, survives a lost executor) or ``cache`` (memory and disk, recomputed from its lineage
# when an executor is lost; later stages are planned over the whole lineage, which is slower).
STAGE_STORAGE = ("local_checkpoint", "checkpoint", "cache")


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
            f"row {shown!r} has more or fewer fields than the header",
            code="csv-ragged-row",
            where=file.group(1),
        )
    return ExtractError(
        f"cannot be read: {_first_line(err)}", code="file-unreadable", where=file.group(1)
    )


class SparkEngine(Engine["SparkSession"]):
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

    # Declared differences the shared steps read (see pipeline.engine.base).
    LABEL = "Spark"
    READS_FHIR = False  # FHIR bulk exports are read by the DuckDB engine only
    CHECK_ROWS_SHOWN = 5  # a failed check's rows are collected on the driver: a few suffice
    TEXT_TYPE = "STRING"

    @property
    def version(self) -> str:
        """Pyspark's version (imported only now: Spark is optional)."""
        import pyspark

        return str(pyspark.__version__)

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
                f"not '{stage_storage}'",
                code="spark-storage-invalid",
            )
        if (stage_storage == "checkpoint") != (checkpoint_folder is not None):
            raise EngineError(
                "Spark stage storage 'checkpoint' goes with a checkpoint folder",
                code="spark-storage-invalid",
            )
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
    def _open(self) -> Iterator[SparkSession]:
        """A session for one run, stopped afterwards unless it is shared.

        A session passed in, or one already running in this process (a notebook, a test
        module), is shared: the run gets its own ``newSession()`` and leaves the shared one up.
        """
        from pyspark.sql import SparkSession

        user = user_settings()
        shared = self.session or SparkSession.getActiveSession()
        if shared is None:
            spark = start_session(self.request, self.request.passed(user))
            spark.sparkContext.setLogLevel("FATAL")
            try:
                with self._storage(spark):
                    yield spark
            finally:
                spark.stop()
            return
        spark = shared.newSession()
        for key, value in self.request.passed(user).items():
            if key.startswith("spark.sql."):
                spark.conf.set(key, value)
        try:
            with self._storage(spark):
                yield spark
        finally:
            spark.catalog.clearCache()

    def _engine_info(self, conn: SparkSession) -> dict[str, Any]:
        """The master, the settings in effect (redacted) and where table stages were kept."""
        watched = self.request.watched(user_settings())
        return {
            "master": safe_master(conn.sparkContext.master),
            "settings": settings_in_effect(conn, watched),
            "stage_storage": self.stage_storage,
        }

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
                    f"cannot be used as the checkpoint folder: {_first_line(err)}",
                    code="checkpoint-folder-unusable",
                    where=self.checkpoint_folder,
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

    def _table_rows(
        self, conn: SparkSession, table: ExtractTable, source: SourceTable | None = None
    ) -> exp.Expression:
        # Registered as a view of its own, as the SQL of the source view reads it.
        raw = f"src_{table.name}_raw"
        self._read(conn, table).createOrReplaceTempView(raw)
        return exp.to_table(raw)

    def _column_type(self, conn: SparkSession, table: ExtractTable, column: exp.Expression) -> str:
        typed = self._read(conn, table).selectExpr(column.sql(self.DIALECT))
        return str(typed.schema.fields[0].dataType.simpleString())

    def _create_view(self, conn: SparkSession, name: str, query: exp.Query) -> None:
        conn.sql(spark_query(query).sql(self.DIALECT)).createOrReplaceTempView(name)

    def _first_rows(self, conn: SparkSession, query: exp.Query, limit: int | None) -> list[Any]:
        frame = conn.sql(spark_query(query).sql(self.DIALECT))
        return list(frame.collect() if limit is None else frame.limit(limit).collect())

    def _fetch(
        self, conn: SparkSession, stage_name: str, order: Sequence[str], rows: int | None
    ) -> pa.Table:
        # Sorted as DuckDB sorts (NULLs last), in partitions of bounded size.
        return to_arrow(conn.table(stage_name), order, rows)

    def _fetch_batches(
        self, conn: SparkSession, stage_name: str, order: Sequence[str], rows: int | None
    ) -> pa.RecordBatchReader:
        return to_arrow_reader(conn.table(stage_name), order, rows)

    def _is_own_error(self, err: BaseException) -> bool:
        return _spark_error(err)

    def _error_text(self, err: BaseException) -> str:
        return _first_line(err)

    def _read_failure(self, err: BaseException) -> ExtractError | None:
        return _read_failure(err)

    # -- running stages ------------------------------------------------------------------------

    def _materialise(self, conn: SparkSession, stage: Stage) -> tuple[int | None, int | None]:
        frame = conn.sql(spark_query(stage.query).sql(self.DIALECT))
        if stage.kind == "view":
            frame.createOrReplaceTempView(stage.name)
            return None, None
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
        return int(count), None
