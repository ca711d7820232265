"""``ascertain build``: run a prepared study's plan and write its outputs.

The engine is chosen by :func:`pipeline.workflows.prepare.prepare`; the quality log's checks,
the manifest and the files are the outputs package's (``outputs/_quality_log.py``,
``outputs/_manifest.py``, ``outputs/_write.py``). What stays here is the order: check the
folder, open the extract, run, check the row accounting and usability, then write.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import tempfile
from concurrent.futures import ThreadPoolExecutor
from contextlib import ExitStack
from dataclasses import dataclass, field
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from pipeline.compile import EVIDENCE_COUNTS, Plan, compile_study, unmatched_definitions
from pipeline.config import load_study
from pipeline.engine import RunResult, SparkEngine, StageCallback
from pipeline.extract import HadoopFiles, is_hadoop_uri, open_extract
from pipeline.outputs import (
    check_usable,
    describe_files,
    extract_inputs,
    extract_root,
    make_manifest,
    parquet_sink,
    study_keys,
    write_outputs,
)
from pipeline.outputs._matched import matched_outputs
from pipeline.outputs._ownership import BUILD
from pipeline.outputs._quality_log import check_row_accounting, locate_first_rows
from pipeline.outputs._write import STREAMED_FILES
from pipeline.workflows.prepare import BuildOptions, Prepared, prepare

__all__ = ["BuildOptions", "BuildResult", "build_study", "evidence_counts", "plan_study"]


def tool_version() -> str:
    """The installed version of ascertain (``0+unknown`` when run from a source tree)."""
    try:
        return version("ascertain")
    except PackageNotFoundError:
        return "0+unknown"


@dataclass(frozen=True)
class BuildResult:
    """What a build produced: where, the plan it ran, and the engine's report.

    The patient-level outputs (cohort, population, episodes, person-time) were streamed from
    the engine into their files and are not in ``run.outputs``: ``run.streamed`` has their
    rows, :attr:`cohort_rows` the cohort's, and :meth:`read` reads a written file back.
    """

    out: Path
    files: list[Path]
    plan: Plan
    run: RunResult
    notes: list[str] = field(default_factory=list)
    """Sentences for the user, e.g. that the previous cohort's report was removed."""
    warnings: list[str] = field(default_factory=list)
    """Things that may mislead without stopping the build: a definition matching no row."""
    attrition: pa.Table | None = None
    """The attrition log as written, with the matching lines (None: the run's own log)."""

    @property
    def cohort_rows(self) -> int:
        """The cohort's patients: the rows written to ``cohort.parquet``."""
        return self.run.streamed["cohort"]

    def read(self, output: str = "cohort") -> pa.Table:
        """A patient-level output as written (``cohort``, ``population``...), read from its file.

        The build holds no copy of these in memory (they grow with the cohort), so this reads
        the file the build wrote: the table has the file's schema, with the data dictionary's
        column metadata on the cohort.

        Raises:
            KeyError: ``output`` is not a file this build streamed.
        """
        return pq.read_table(self.out / STREAMED_FILES[output])

    def attrition_lines(self) -> list[str]:
        """The attrition log as the build's terminal summary prints it, one line per step.

        From the log as written, so a matched study's ``match_*`` lines (sets, sets with a
        control, sets with all controls) follow the eligibility steps as in attrition.csv.
        """
        log = self.attrition if self.attrition is not None else self.run.outputs["attrition"]
        return [
            f"{r['step']:<24} removed {r['removed']:>9,}  remaining {r['remaining']:>9,}"
            for r in log.to_pylist()
        ]


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
    ready = prepare(study_file, options, owner=BUILD)
    # The patient-level outputs are streamed from the engine into files here, then moved into
    # the output folder: the driver never holds one whole.
    with tempfile.TemporaryDirectory(prefix="ascertain-build-") as scratch:
        return _run_and_write(ready, Path(scratch), on_stage)


def _run_and_write(ready: Prepared, scratch: Path, on_stage: StageCallback | None) -> BuildResult:
    """Run the prepared study, check the row accounting and usability, write the outputs."""
    loaded, plan, extract, engine = ready.loaded, ready.plan, ready.extract, ready.engine
    study, out, threads, notes = loaded.study, ready.out, ready.threads, ready.notes
    assert out is not None  # prepare resolves the folder when given an owner
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
        streamed = {o: scratch / STREAMED_FILES[o] for o, *_ in plan.outputs if o in STREAMED_FILES}
        docs = {"cohort": plan.columns, "population": None, **dict(plan.output_columns)}
        sinks = {o: parquet_sink(path, docs.get(o, ())) for o, path in streamed.items()}
        run = engine.run(plan, tables, on_stage=on_stage, sinks=sinks)
        finished = dt.datetime.now(dt.UTC)
        extract_entries = hashed_extract.result()
    quality = check_row_accounting(run.outputs["quality"], run.outputs["rows_read"])
    located_quality = locate_first_rows(run.outputs["quality"], tables, extract)
    check_usable(
        study,
        {table: counts["read"] for table, counts in quality.items()},
        located_quality,
        run.outputs["attrition"],
        run.streamed["cohort"],
    )
    matched, attrition, matching = matched_outputs(
        run.outputs, study.matching, pq.read_schema(streamed["cohort"]), run.streamed["cohort"]
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
        definition_files=[
            *loaded.catalog.files.values(),
            *loaded.catalog.list_files(),
            *loaded.local_codes.files,
        ],
        measure_files=loaded.measures.files.values(),
        reference_files=[loaded.reference_rates.file] if loaded.reference_rates else [],
        library=study.library,
        extract=extract,
        extract_entries=extract_entries,
        out=out,
        plan_hash=plan.content_hash(),
        database=opened.database.as_manifest() if opened.database else None,
        keys=study_keys(study),
        rows={
            "cohort": run.streamed["cohort"],
            # the files the manifest has always counted: not the population
            **{o: n for o, n in run.streamed.items() if o in ("persontime", "episodes")},
            **({"matched": matched.num_rows} if matched is not None else {}),
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
            "cohort_patients": run.streamed["cohort"],
            "attrition": attrition.select(["step", "remaining"]).to_pylist(),
            **({"matching": dataclasses.asdict(matching)} if matching is not None else {}),
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
        cohort=streamed["cohort"],
        population=streamed["population"],
        attrition=attrition,
        quality=located_quality,
        columns=plan.columns,
        manifest=manifest,
        run_info=run_info,
        persontime=streamed.get("persontime"),
        persontime_columns=dict(plan.output_columns).get("persontime", ()),
        matched=matched,
        matched_columns=dict(plan.output_columns).get("matched", ()),
        episodes=streamed.get("episodes"),
        episodes_columns=dict(plan.output_columns).get("episodes", ()),
    )
    return BuildResult(
        out,
        written.files,
        plan,
        run,
        [*notes, *written.notes],
        [u.message() for u in unmatched],
        attrition,
    )


def evidence_counts(table: pa.Table) -> dict[int, int]:
    """Evidence number -> patient-days, from a plan's ``evidence_counts`` output."""
    return {row["evidence"]: row["n_events"] for row in table.to_pylist()}
