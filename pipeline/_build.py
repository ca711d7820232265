"""The library's front door: load a study, compile it, run it, write its outputs."""

from __future__ import annotations

import datetime as dt
import tempfile
from concurrent.futures import ThreadPoolExecutor
from contextlib import ExitStack
from dataclasses import dataclass, field
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

import pyarrow as pa

from pipeline.compile import (
    EVIDENCE_COUNTS,
    POSITION_BASE,
    Plan,
    compile_study,
    unmatched_definitions,
)
from pipeline.config import LoadedStudy, load_study
from pipeline.config._spark import SparkSettings
from pipeline.engine import DuckDBEngine, RunResult, SparkEngine, StageCallback
from pipeline.engine._spark_session import (
    DEFAULT_MASTER,
    is_local,
    master_addresses,
    parse_settings,
)
from pipeline.errors import AscertainError, EngineError
from pipeline.extract import (
    ExtractTable,
    HadoopFiles,
    database_source,
    discover_extract,
    is_hadoop_uri,
    open_extract,
)
from pipeline.outputs import (
    changed_inputs,
    check_usable,
    describe_files,
    extract_inputs,
    extract_root,
    file_name,
    make_manifest,
    read_manifest,
    sha256_file,
    study_keys,
    write_outputs,
)
from pipeline.outputs._ownership import BUILD, check_folder


def tool_version() -> str:
    """The installed version of ascertain (``0+unknown`` when run from a source tree)."""
    try:
        return version("ascertain")
    except PackageNotFoundError:
        return "0+unknown"


@dataclass(frozen=True)
class BuildOptions:
    """Command-line overrides of a study's extract, output folder and engine settings.

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


ENGINES = ("duckdb", "spark")


def make_engine(
    options: BuildOptions,
    threads: int | None,
    memory_limit: str | None,
    spark: SparkSettings | None = None,
    notes: list[str] | None = None,
) -> DuckDBEngine | SparkEngine:
    """The engine the options name: DuckDB (default) or Spark (``local[*]`` or a master URL).

    ``--threads`` sets a local Spark's thread count; with a master URL it (and, on Spark,
    ``--memory-limit`` always) is not applied, and a sentence saying so is added to ``notes``.

    Raises:
        EngineError: An unknown engine, Spark options given to DuckDB, a malformed master URL
            or ``--spark-conf`` setting.
    """
    if options.engine not in ENGINES:
        raise EngineError(f"--engine must be one of {', '.join(ENGINES)}, not '{options.engine}'")
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
        raise EngineError("--spark-master and --spark-conf need --engine spark")
    source = "option" if options.memory_limit else "study"
    return DuckDBEngine(threads=threads, memory_limit=memory_limit, memory_limit_from=source)


@dataclass(frozen=True)
class BuildResult:
    """What a build produced: where, the plan it ran, and the engine's report."""

    out: Path
    files: list[Path]
    plan: Plan
    run: RunResult
    notes: list[str] = field(default_factory=list)
    """Sentences for the user, e.g. that the previous cohort's report was removed."""
    warnings: list[str] = field(default_factory=list)
    """Things that may mislead without stopping the build: a definition matching no row."""


def plan_study(study_file: Path) -> Plan:
    """Load and compile a study without running it."""
    return compile_study(load_study(study_file))


def build_study(
    study_file: Path,
    options: BuildOptions | None = None,
    *,
    on_stage: StageCallback | None = None,
) -> BuildResult:
    """Build a study's cohort and write its outputs.

    The output folder must be new, empty or a previous build's (see
    :mod:`pipeline.outputs._ownership`); it is checked before the engine starts.

    Raises:
        AscertainError: Bad config, a bad extract, an engine failure, or an output folder
            holding files ascertain did not write (OutputFolderError); nothing is written.
    """
    options = options or BuildOptions()
    loaded: LoadedStudy = load_study(study_file)
    study = loaded.study
    plan = compile_study(loaded)
    extract = resolve_extract(options.extract or study.extract)
    out = (options.out or study.output.folder).resolve()
    # Before anything is read, so a refused build costs nothing and touches nothing.
    check_folder(out, BUILD, inputs=local_inputs(extract, plan))
    threads = options.threads or study.engine.threads
    notes: list[str] = []
    engine = make_engine(
        options, threads, options.memory_limit or study.engine.memory_limit, study.spark, notes
    )
    if isinstance(engine, SparkEngine) and database_source(extract) is not None:
        raise EngineError(
            "a Spark build reads files; a database extract can be built with --engine duckdb"
        )
    with ExitStack() as stack:
        hadoop = None
        if is_hadoop_uri(extract) and isinstance(engine, SparkEngine):
            # The session starts first: the extract is listed and hashed through its file
            # systems, and a scheme it lacks is refused before any stage runs.
            hadoop = HadoopFiles.of(stack.enter_context(engine.started()))
        opened = stack.enter_context(open_extract(extract, plan.sources, hadoop=hadoop))
        hasher = stack.enter_context(ThreadPoolExecutor(1))
        tables = opened.tables
        extract_files = extract_inputs(extract, opened.files)
        # Hashing the extract overlaps with the engine's work instead of adding to it.
        hashed_extract = hasher.submit(describe_files, extract_files, extract_root(extract))
        started = dt.datetime.now(dt.UTC)
        run = engine.run(plan, tables, on_stage=on_stage)
        finished = dt.datetime.now(dt.UTC)
        extract_entries = hashed_extract.result()
    quality = check_row_accounting(run.outputs["quality"], run.outputs["rows_read"])
    located_quality = locate_first_rows(run.outputs["quality"], tables, extract)
    check_usable(
        study,
        {table: counts["read"] for table, counts in quality.items()},
        located_quality,
        run.outputs["attrition"],
        run.outputs["cohort"].num_rows,
    )
    manifest = make_manifest(
        tool_version=tool_version(),
        engine={
            "name": run.engine,
            "version": run.engine_version,
            "threads": threads,
            **run.engine_info,
        },
        study_file=loaded.file,
        # the definition files and every code list file they read (CSV, header, hierarchy)
        definition_files=[*loaded.catalog.files.values(), *loaded.catalog.list_files()],
        measure_files=loaded.measures.files.values(),
        library=study.library,
        extract=extract,
        extract_entries=extract_entries,
        out=out,
        plan_hash=plan.content_hash(),
        database=opened.database.as_manifest() if opened.database else None,
        keys=study_keys(study),
        rows={
            "cohort": run.outputs["cohort"].num_rows,
            **(
                {"persontime": run.outputs["persontime"].num_rows}
                if "persontime" in run.outputs
                else {}
            ),
            **{row["source_table"]: row["n_rows"] for row in run.outputs["rows_read"].to_pylist()},
        },
    )
    unmatched = unmatched_definitions(loaded, evidence_counts(run.outputs[EVIDENCE_COUNTS]))
    run_info = {
        "study": study.study,
        "study_file": loaded.file.name,
        "extract": manifest["locations"]["extract_from_study"],
        "started_utc": started.isoformat(timespec="seconds"),
        "finished_utc": finished.isoformat(timespec="seconds"),
        "engine": {
            "name": run.engine,
            "version": run.engine_version,
            **run.engine_info,
            **run.run_settings,
        },
        "quality": quality,
        "unmatched_definitions": [
            {"use": u.what, "definition": u.definition or None, "evidence": list(u.keys)}
            for u in unmatched
        ],
        "counts": {
            "cohort_patients": run.outputs["cohort"].num_rows,
            "attrition": run.outputs["attrition"].select(["step", "remaining"]).to_pylist(),
        },
        "stages": [
            {
                "name": s.name,
                "kind": s.kind,
                "seconds": round(s.seconds, 3),
                "rows": s.rows,
                "memory_bytes": s.memory_bytes,
            }
            for s in run.stages
        ],
    }
    written = write_outputs(
        out,
        cohort=run.outputs["cohort"],
        population=run.outputs["population"],
        attrition=run.outputs["attrition"],
        quality=located_quality,
        columns=plan.columns,
        manifest=manifest,
        run_info=run_info,
        persontime=run.outputs.get("persontime"),
        persontime_columns=dict(plan.output_columns).get("persontime", ()),
    )
    return BuildResult(
        out,
        written.files,
        plan,
        run,
        [*notes, *written.notes],
        [u.message() for u in unmatched],
    )


def evidence_counts(table: pa.Table) -> dict[int, int]:
    """Evidence number -> patient-days, from a plan's ``evidence_counts`` output."""
    return {row["evidence"]: row["n_events"] for row in table.to_pylist()}


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
                f"{counts['used']:,}, set aside {counts['set_aside']:,}"
            )
    return summary


@dataclass(frozen=True)
class VerifyResult:
    """What ``verify`` found: changed inputs and output files that differ on rebuild."""

    changed_inputs: list[str]
    differing_outputs: list[str]

    @property
    def identical(self) -> bool:
        """Whether the rebuild reproduced every output file bit for bit."""
        return not self.changed_inputs and not self.differing_outputs


def locate_inputs(
    folder: Path, manifest: dict[str, Any], study: Path | None, extract: Path | str | None
) -> tuple[Path, Path | str | None]:
    """Where the study and the extract to rebuild from are on this machine.

    The study is ``study`` if given, else the manifest's hint (the study file relative to the
    output folder). The extract is ``extract`` if given, else the manifest's hint (the extract
    the build read, relative to the study's folder), else ``None``: the study's own
    ``extract:``. A database source is found by its recorded URI (no password).

    Raises:
        AscertainError: The study or the recorded extract cannot be found on this machine.
    """
    name = manifest["study"][0]["path"]
    locations = manifest.get("locations", {})
    if study is None:
        hint = locations.get("study_from_output")
        if hint is None:
            raise AscertainError(
                f"{folder}: the manifest does not say where the study file {name} is "
                "(it was too far from the output folder to record); pass --study FILE"
            )
        study = folder.resolve() / hint  # the hint was made from the resolved folder
    if not study.is_file():
        raise AscertainError(f"{study}: the study file {name} is not there; pass --study FILE")
    if extract is None and locations.get("extract_kind") == "hadoop folder":
        raise AscertainError(
            f"{folder}: the build read the extract '{locations.get('extract_name')}' on "
            f"{locations.get('extract_scheme')}://, and the manifest keeps no server address; "
            "pass --extract URI"
        )
    if extract is None and locations.get("extract_uri") is not None:
        return study, str(locations["extract_uri"])
    if extract is None and locations.get("extract_from_study") is not None:
        extract = study.resolve().parent / locations["extract_from_study"]
        if not extract.exists():
            raise AscertainError(
                f"{extract}: the extract the build read ({locations['extract_from_study']} "
                "from the study's folder) is not there; pass --extract DIR"
            )
    return study, extract


def verify_output(
    folder: Path,
    *,
    study: Path | None = None,
    extract: Path | str | None = None,
    spark_master: str | None = None,
    spark_conf: tuple[str, ...] = (),
) -> VerifyResult:
    """Rebuild an output folder from its manifest in a temporary folder and compare.

    The inputs may live elsewhere than at the build (another machine, another layout): they
    are found as :func:`locate_inputs` says and compared by their recorded relative paths.

    Args:
        folder: An output folder written by ``build``.
        study: The study file, when it is not where the manifest's hint says.
        extract: The extract folder, mapping file or connection URI, when not where the
            manifest's hint says.
        spark_master: Rebuild on this Spark master (default: the recorded engine; Spark
            builds on ``local[*]``, since the recorded master may not be reachable from here).
        spark_conf: ``key=value`` Spark settings for the rebuild (implies Spark).

    Raises:
        AscertainError: The folder has no manifest, an input cannot be found, or the rebuild
            fails.
    """
    manifest = read_manifest(folder)
    study, extract = locate_inputs(folder, manifest, study, extract)
    with tempfile.TemporaryDirectory(prefix="ascertain-verify-") as scratch:
        rebuilt = Path(scratch) / "out"
        options = BuildOptions(
            extract=extract,
            out=rebuilt,
            threads=manifest["engine"].get("threads"),
            engine="spark"
            if spark_master or spark_conf
            else manifest["engine"].get("name", "duckdb"),
            spark_master=spark_master,
            spark_conf=spark_conf,
        )
        build_study(study, options)
        again = read_manifest(rebuilt)
    changes = changed_inputs(manifest, again)
    differing = [
        name
        for name in sorted(set(manifest["outputs"]) | set(again["outputs"]))
        if manifest["outputs"].get(name) != again["outputs"].get(name)
    ]
    for name in sorted(manifest["outputs"]):
        path = folder / name
        if not path.is_file() or sha256_file(path) != manifest["outputs"][name]:
            differing.append(f"{name} (the file in the folder no longer matches the manifest)")
    if again["plan_hash"] != manifest["plan_hash"]:
        differing.append("the plan (the study or a definition compiles differently now)")
    return VerifyResult(changes, differing)
