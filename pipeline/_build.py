"""The library's front door: load a study, compile it, run it, write its outputs."""

from __future__ import annotations

import datetime as dt
import platform
from dataclasses import dataclass
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path

from pipeline.compile import Plan, compile_study
from pipeline.config import LoadedStudy, load_study
from pipeline.engine import DuckDBEngine, RunResult
from pipeline.engine._duckdb import StageCallback
from pipeline.extract import discover_extract
from pipeline.outputs import write_outputs


def tool_version() -> str:
    """The installed version of ascertain (``0+unknown`` when run from a source tree)."""
    try:
        return version("ascertain")
    except PackageNotFoundError:
        return "0+unknown"


@dataclass(frozen=True)
class BuildOptions:
    """Command-line overrides of a study's extract, output folder and engine settings."""

    extract: Path | None = None
    out: Path | None = None
    threads: int | None = None
    memory_limit: str | None = None


@dataclass(frozen=True)
class BuildResult:
    """What a build produced: where, the plan it ran, and the engine's report."""

    out: Path
    files: list[Path]
    plan: Plan
    run: RunResult


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

    Raises:
        AscertainError: Bad config, a bad extract, or an engine failure; nothing is written.
    """
    options = options or BuildOptions()
    loaded: LoadedStudy = load_study(study_file)
    study = loaded.study
    plan = compile_study(loaded)
    extract = (options.extract or study.extract).resolve()
    out = (options.out or study.output.folder).resolve()
    tables = discover_extract(extract, plan.sources)
    engine = DuckDBEngine(
        threads=options.threads or study.engine.threads,
        memory_limit=options.memory_limit or study.engine.memory_limit,
    )
    started = dt.datetime.now(dt.UTC)
    run = engine.run(plan, tables, on_stage=on_stage)
    finished = dt.datetime.now(dt.UTC)
    cohort = run.outputs["cohort"]
    run_info = {
        "study": study.study,
        "study_file": str(loaded.file),
        "extract": str(extract),
        "tool_version": tool_version(),
        "engine": {"name": run.engine, "version": run.engine_version},
        "python": platform.python_version(),
        "plan_hash": plan.content_hash(),
        "started_utc": started.isoformat(timespec="seconds"),
        "finished_utc": finished.isoformat(timespec="seconds"),
        "counts": {
            "cohort_patients": cohort.num_rows,
            "attrition": run.outputs["attrition"].select(["step", "remaining"]).to_pylist(),
        },
        "stages": [
            {"name": s.name, "kind": s.kind, "seconds": round(s.seconds, 3), "rows": s.rows}
            for s in run.stages
        ],
    }
    files = write_outputs(
        out,
        cohort=cohort,
        attrition=run.outputs["attrition"],
        columns=plan.columns,
        run_info=run_info,
    )
    return BuildResult(out, files, plan, run)
