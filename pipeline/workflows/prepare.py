"""What every workflow does before its own work: the study, its plan, the extract, the engine.

Each command that runs a study's plan (build, verify through build, explain, validate, codes,
check with an extract) starts here, so the engine is chosen and constructed in one place
(:func:`make_engine`) and every command honours the study's ``engine: threads, memory_limit``
and the command line's options alike. ``profile`` has no study; it gets its engine from
:func:`make_engine` too.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from pipeline.compile import Plan, compile_study
from pipeline.config import LoadedStudy, load_study
from pipeline.config._spark import SparkSettings
from pipeline.engine import DuckDBEngine, SparkEngine
from pipeline.engine._spark_session import (
    DEFAULT_MASTER,
    is_local,
    master_addresses,
    parse_settings,
)
from pipeline.errors import EngineError
from pipeline.extract import database_source, discover_extract
from pipeline.outputs._ownership import Owner, check_folder

ENGINES = ("duckdb", "spark")


@dataclass(frozen=True)
class BuildOptions:
    """Command-line overrides of a study's extract, output folder and engine settings.

    Every workflow that runs a study takes these; those that write nothing ignore ``out``, and
    those that run on DuckDB only leave ``engine`` at its default.

    ``extract`` is a folder or mapping file, or a database connection URI (text).
    """

    extract: Path | str | None = None
    out: Path | None = None
    threads: int | None = None
    memory_limit: str | None = None
    engine: str = "duckdb"
    spark_master: str | None = None
    spark_conf: tuple[str, ...] = ()
    """``key=value`` Spark settings (``--spark-conf``), over the study's ``spark: settings``."""


def make_engine(
    options: BuildOptions,
    threads: int | None,
    memory_limit: str | None,
    spark: SparkSettings | None = None,
    notes: list[str] | None = None,
) -> DuckDBEngine | SparkEngine:
    """The engine the options name: DuckDB (default) or Spark (``local[*]`` or a master URL).

    The only place an engine is constructed outside tests; ``threads`` and ``memory_limit``
    are the settings in effect (the option's, else the study's). ``--threads`` sets a local
    Spark's thread count; with a master URL it (and, on Spark, ``--memory-limit`` always) is
    not applied, and a sentence saying so is added to ``notes``.

    Raises:
        EngineError: An unknown engine, Spark options given to DuckDB, a malformed master URL
            or ``--spark-conf`` setting.
    """
    if options.engine not in ENGINES:
        raise EngineError(
            f"--engine must be one of {', '.join(ENGINES)}, not '{options.engine}'",
            code="unknown-engine",
        )
    if options.engine == "spark":
        spark = spark or SparkSettings()
        notes = notes if notes is not None else []
        master = options.spark_master or (f"local[{threads}]" if threads else DEFAULT_MASTER)
        master_addresses(master)  # a malformed URL is refused before any work
        if options.spark_master and options.threads and not is_local(master):
            notes.append(
                f"--threads {options.threads} is not applied with --spark-master {master}: "
                "set --spark-conf spark.cores.max=N (or spark.executor.cores) instead"
            )
        if options.memory_limit:
            notes.append(
                f"--memory-limit {options.memory_limit} is a DuckDB setting, not applied on "
                "Spark: set --spark-conf spark.executor.memory=SIZE (and spark.driver.memory)"
            )
        settings = {**spark.text_settings(), **parse_settings(options.spark_conf, "--spark-conf")}
        return SparkEngine(
            master,
            conf=settings,
            connect_timeout=spark.connect_timeout_seconds,
            stage_storage=spark.stage_storage,
            checkpoint_folder=spark.checkpoint_folder,
        )
    if options.spark_master or options.spark_conf:
        raise EngineError(
            "--spark-master and --spark-conf need --engine spark",
            code="spark-options-without-spark",
        )
    source = "option" if options.memory_limit else "study"
    return DuckDBEngine(threads=threads, memory_limit=memory_limit, memory_limit_from=source)


@dataclass(frozen=True)
class Prepared:
    """A study ready to run: loaded, compiled, its extract located and its engine chosen.

    Attributes:
        loaded: The study with its definitions and measures.
        plan: The study's whole plan (workflows run a part of it as they need).
        extract: The extract to read, made absolute (a connection URI stays text).
        engine: The engine, with the settings in effect.
        threads: The thread count in effect (the option's, else the study's; ``None``: the
            engine's default), recorded in the manifest.
        out: The output folder made absolute, when an ``owner`` was given to :func:`prepare`.
        notes: Sentences for the user about options that were not applied.
    """

    loaded: LoadedStudy
    plan: Plan
    extract: Path | str
    engine: DuckDBEngine | SparkEngine
    threads: int | None
    out: Path | None = None
    notes: list[str] = field(default_factory=list)


def prepare(
    study_file: Path, options: BuildOptions | None = None, *, owner: Owner | None = None
) -> Prepared:
    """Load and compile a study, locate its extract and construct its engine.

    With an ``owner``, the output folder (``options.out``, else the study's) is checked first:
    a folder the command may not write into is refused before the engine is constructed or
    anything is read.

    Args:
        study_file: The study file.
        options: Command-line overrides (default: none; DuckDB with the study's settings).
        owner: The command that will write into the output folder, if it writes one.

    Raises:
        AscertainError: Bad config; OutputFolderError for a refused folder; EngineError for
            bad engine options or a database extract given to Spark.
    """
    options = options or BuildOptions()
    loaded = load_study(study_file)
    study = loaded.study
    plan = compile_study(loaded)
    extract = resolve_extract(options.extract or study.extract)
    out = None
    if owner is not None:
        out = (options.out or study.output.folder).resolve()
        # Before anything is read, so a refused command costs nothing and touches nothing.
        check_folder(out, owner, inputs=local_inputs(extract, plan))
    threads = options.threads or study.engine.threads
    notes: list[str] = []
    engine = study_engine(loaded, extract, options, notes)
    return Prepared(loaded, plan, extract, engine, threads, out, notes)


def study_engine(
    loaded: LoadedStudy, extract: Path | str, options: BuildOptions, notes: list[str]
) -> DuckDBEngine | SparkEngine:
    """The engine a study runs on: the command line's options over its ``engine:`` and ``spark:``.

    Shared by :func:`prepare` and the sweep (which loads its studies itself), so both honour the
    same settings and refuse the same combinations.

    Raises:
        EngineError: Bad engine options, or a database extract given to Spark.
    """
    study = loaded.study
    threads = options.threads or study.engine.threads
    engine = make_engine(
        options, threads, options.memory_limit or study.engine.memory_limit, study.spark, notes
    )
    if isinstance(engine, SparkEngine) and database_source(extract) is not None:
        raise EngineError(
            "a Spark build reads files; a database extract can be built with --engine duckdb",
            code="database-on-spark",
        )
    return engine


def local_inputs(extract: Path | str, plan: Plan) -> list[tuple[str, Path]]:
    """The extract's files on this machine, which no output folder may hold or lie inside."""
    if isinstance(extract, str):  # a connection URI: nothing on this machine to protect
        return []
    files = (
        []
        if database_source(extract) is not None
        else [f for table in discover_extract(extract, plan.sources).values() for f in table.files]
    )
    return [("extract", extract), *(("extract file", f) for f in files)]


def resolve_extract(extract: Path | str) -> Path | str:
    """An extract argument made absolute (a connection URI is left as it is)."""
    return extract if isinstance(extract, str) else extract.resolve()
