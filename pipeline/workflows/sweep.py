"""Definition sensitivity in one run: every variant of a sweep built in one engine session.

Each variant (and the base) compiles to its own plan; :func:`merge_plans` turns them into one
plan in which a stage computed identically by several variants, with everything it reads, runs
once. Only the stages downstream of a change run per variant. The numbers per variant and
outcome are worked out in :mod:`pipeline.workflows._sweep_numbers`; this module runs and writes.
"""

from __future__ import annotations

import os
import time
from contextlib import ExitStack
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pyarrow as pa
import yaml

from pipeline.compile import Plan, compile_study
from pipeline.compile._shared import MergedPlan, merge_plans
from pipeline.config import LoadedStudy
from pipeline.config._sweep import (
    BASE,
    Sweep,
    Variant,
    apply_override,
    load_sweep,
    load_variant,
    target_parts,
)
from pipeline.config._yaml import LocatedDocument
from pipeline.engine import SparkEngine, StageCallback
from pipeline.errors import EngineError, UnusableBuildError
from pipeline.extract import ExtractTable, HadoopFiles, is_hadoop_uri, open_extract
from pipeline.outputs import check_usable
from pipeline.outputs._ownership import Owner, check_folder, install, staging
from pipeline.outputs._quality_log import check_row_accounting, locate_first_rows
from pipeline.outputs.report._sweep import SweepFacts
from pipeline.workflows._sweep_numbers import COLUMNS, sweep_rows
from pipeline.workflows.build import build_study
from pipeline.workflows.prepare import BuildOptions, local_inputs, resolve_extract, study_engine

SWEEP = Owner("sweep", "ascertain-sweep.json")


@dataclass(frozen=True)
class SweepOptions:
    """Command-line overrides: the extract, the output folder, the engine and its settings.

    ``keep`` names variants (or ``base``) to write as full build folders as well. ``engine``,
    ``spark_master`` and ``spark_conf`` are the build's (:class:`BuildOptions`).
    """

    extract: Path | str | None = None
    out: Path | None = None
    threads: int | None = None
    memory_limit: str | None = None
    keep: tuple[str, ...] = ()
    engine: str = "duckdb"
    spark_master: str | None = None
    spark_conf: tuple[str, ...] = ()

    def build_options(self, out: Path | None = None) -> BuildOptions:
        """The same settings as a build's options (for the engine and each kept variant)."""
        return BuildOptions(
            extract=self.extract,
            out=out,
            threads=self.threads,
            memory_limit=self.memory_limit,
            engine=self.engine,
            spark_master=self.spark_master,
            spark_conf=self.spark_conf,
        )


@dataclass(frozen=True)
class SweepRun:
    """What running a sweep computed (nothing written yet).

    Attributes:
        sweep: The sweep, loaded.
        plans: Each variant's own plan, the base first.
        merged: The one plan that ran, and the stages it shared.
        cohorts: Each variant's analysis table.
        seconds: The engine's time for the merged plan.
    """

    sweep: Sweep
    plans: dict[str, Plan]
    merged: MergedPlan
    cohorts: dict[str, pa.Table]
    seconds: float
    rows: list[dict[str, Any]] = field(default_factory=list)
    """The numbers per variant and outcome, unsuppressed (patient-level)."""
    engine: str = "duckdb"
    """The engine that ran the merged plan (its dialect name)."""
    notes: list[str] = field(default_factory=list)
    """Sentences for the user about options that were not applied."""


OUTPUTS = ("cohort", "attrition", "quality", "rows_read")
"""The outputs computed of every variant: its cohort, and what a build checks before writing."""


def variant_studies(sweep: Sweep) -> dict[str, LoadedStudy]:
    """The base study and each variant's, loaded and checked, keyed by name (``base`` first)."""
    return {BASE: sweep.base, **{v.name: load_variant(sweep, v) for v in sweep.variants}}


def variant_plans(sweep: Sweep) -> dict[str, Plan]:
    """The base's plan and each variant's, keyed by name (``base`` first)."""
    return {key: compile_study(loaded) for key, loaded in variant_studies(sweep).items()}


def run_sweep(
    sweep_file: Path,
    options: SweepOptions | None = None,
    *,
    on_stage: StageCallback | None = None,
) -> SweepRun:
    """Load a sweep, compile every variant and run them all as one plan in one engine session.

    Every variant passes the checks a build makes before writing (the plan's data checks, the
    row accounting, misread shares and an empty cohort, :func:`check_variant`), each with its
    own study's settings; a failure names the variant.

    Raises:
        AscertainError: Bad sweep file or variant (located in the sweep file), a bad extract,
            an engine failure, or a variant a build would refuse (UnusableBuildError).
    """
    options = options or SweepOptions()
    sweep = load_sweep(sweep_file)
    for name in options.keep:
        if name != BASE:
            sweep.variant(name)
    studies = variant_studies(sweep)
    plans = {key: compile_study(loaded) for key, loaded in studies.items()}
    merged = merge_plans(plans, OUTPUTS)
    extract = resolve_extract(options.extract or sweep.base.study.extract)
    notes: list[str] = []
    engine = study_engine(sweep.base, extract, options.build_options(), notes)
    with ExitStack() as stack:
        hadoop = None
        if is_hadoop_uri(extract) and isinstance(engine, SparkEngine):
            # As in a build: the session lists the extract through its file systems.
            hadoop = HadoopFiles.of(stack.enter_context(engine.started()))
        opened = stack.enter_context(open_extract(extract, merged.plan.sources, hadoop=hadoop))
        started = time.perf_counter()
        try:
            run = engine.run(merged.plan, opened.tables, on_stage=on_stage)
        except EngineError as err:
            raise _naming_variants(err, merged) from err
        seconds = time.perf_counter() - started
        for key, loaded in studies.items():
            outputs = {o: run.outputs[f"{key}/{o}"] for o in OUTPUTS}
            check_variant(key, loaded, outputs, opened.tables, extract)
    cohorts = {key: run.outputs[f"{key}/cohort"] for key in plans}
    rows = sweep_rows(cohorts, sweep.outcomes)
    return SweepRun(sweep, plans, merged, cohorts, seconds, rows, run.engine, notes)


def check_variant(
    key: str,
    loaded: LoadedStudy,
    outputs: dict[str, pa.Table],
    tables: dict[str, ExtractTable],
    extract: Path | str,
) -> None:
    """Make the checks ``build`` makes after its run, for one variant, naming it on failure.

    The row accounting (used + set aside = read, a defect of the tool if not), then
    :func:`check_usable` with the variant's own study: misread shares beyond its
    ``quality.max_share_set_aside``, an empty cohort without ``output.allow_empty_cohort``.

    Raises:
        EngineError: The rows of a table do not add up.
        UnusableBuildError: A build of the variant would be refused.
    """
    try:
        quality = check_row_accounting(outputs["quality"], outputs["rows_read"])
        located = locate_first_rows(outputs["quality"], tables, extract)
        check_usable(
            loaded.study,
            {table: counts["read"] for table, counts in quality.items()},
            located,
            outputs["attrition"],
            outputs["cohort"].num_rows,
        )
    except EngineError as err:
        raise EngineError(
            f"variant '{key}': {err.message}", code=err.code, where=err.where
        ) from err
    except UnusableBuildError as err:
        raise UnusableBuildError(f"variant '{key}': {err}") from err


def _naming_variants(err: EngineError, merged: MergedPlan) -> EngineError:
    """The engine's error with the variants that run the failing stage named, if it is one.

    The engine names a failing stage as ``where="stage <name>"`` (``engine/base.py``).
    """
    stage = (err.where or "").removeprefix("stage ")
    users = [key for key, stages in merged.names.items() if stage in stages.values()]
    if not users:
        return err
    which = "every variant" if len(users) == len(merged.names) else ", ".join(users)
    return EngineError(f"{err.message} (stage of {which})", code=err.code, where=err.where)


def _relative(target: Path, start: Path) -> str:
    return Path(os.path.relpath(target, start)).as_posix()


def _rewrite_lists(data: Any, source: Path, folder: Path) -> Any:
    """A definition's data with its code list paths made relative to ``folder``."""
    if isinstance(data, dict):
        return {
            key: (
                [_relative((source.parent / p).resolve(), folder) for p in value]
                if key == "lists" and isinstance(value, list)
                else _rewrite_lists(value, source, folder)
            )
            for key, value in data.items()
        }
    if isinstance(data, list):
        return [_rewrite_lists(item, source, folder) for item in data]
    return data


def write_variant_inputs(sweep: Sweep, variant: Variant, folder: Path, out: Path) -> Path:
    """Write a variant as a study file (and its definitions) that ``build`` and ``verify`` read.

    ``folder`` is where the files go and ``out`` the build folder the study names: paths in
    the written files are relative to ``folder``, so ``folder`` and ``out`` may be staged
    first and moved together later. Returns the study file.
    """
    base = sweep.base
    study_doc = yaml.safe_load(base.file.read_text(encoding="utf-8"))
    study_doc.update(
        {
            "extract": study_doc["extract"]
            if isinstance(base.study.extract, str)
            else _relative(base.study.extract, folder),
            "output": {**study_doc.get("output", {}), "folder": _relative(out, folder)},
        }
    )
    if "measures" in study_doc:
        study_doc["measures"] = [
            _relative((base.file.parent / p).resolve(), folder) for p in base.study.measures
        ]
    changed: dict[str, Any] = {}
    for override in variant.overrides:
        parts = target_parts(override.target)
        if parts[0] == "study":
            study_doc = _set(study_doc, parts[1:], override.value)
        else:
            name = str(parts[1])
            current = changed.get(name)
            if current is None:
                current = yaml.safe_load(base.catalog.files[name].read_text(encoding="utf-8"))
            changed[name] = _set(current, parts[2:], override.value)
    definitions = folder / "definitions"
    definitions.mkdir(parents=True, exist_ok=True)
    study_doc.pop("library", None)
    study_doc["definitions"] = "definitions"
    for name, file in sorted(base.catalog.files.items()):
        data = changed.get(name) or yaml.safe_load(file.read_text(encoding="utf-8"))
        data = _rewrite_lists(data, file, definitions)
        text = yaml.safe_dump(data, sort_keys=False, allow_unicode=True)
        (definitions / file.name).write_text(text, encoding="utf-8")
    study_file = folder / "study.yaml"
    text = yaml.safe_dump(study_doc, sort_keys=False, allow_unicode=True)
    study_file.write_text(text, encoding="utf-8")
    return study_file


def _set(data: Any, parts: list[str | int], value: Any) -> Any:
    """``data`` with one override applied (its path was checked when the sweep was loaded)."""
    doc = LocatedDocument(Path("variant"), data, {}, {})
    return apply_override(doc, parts, value, 1).data


def sweep_folder(sweep_file: Path, options: SweepOptions) -> Path:
    """Where a sweep writes: ``--out``, else ``<base output folder>_sweep_<sweep name>``.

    Raises:
        ConfigError: The sweep file cannot be read (the base study names the default).
    """
    if options.out is not None:
        return options.out.resolve()
    sweep = load_sweep(sweep_file)
    folder = sweep.base.study.output.folder
    return folder.with_name(f"{folder.name}_sweep_{sweep.name}")


def check_sweep_folder(sweep_file: Path, out: Path, extract: Path | str | None = None) -> None:
    """Refuse an output folder holding foreign files or overlapping an input, before any work.

    The inputs are those a build protects (the extract and each of its files, found as the
    base plan reads them) and the sweep file.

    Raises:
        OutputFolderError: The folder may not be written.
        AscertainError: The sweep file or the extract cannot be read.
    """
    sweep = load_sweep(sweep_file)
    located = resolve_extract(extract or sweep.base.study.extract)
    inputs = [("sweep file", sweep_file.resolve())]
    inputs += local_inputs(located, compile_study(sweep.base))
    check_folder(out, SWEEP, inputs=inputs)


def write_sweep(run: SweepRun, out: Path, options: SweepOptions | None = None) -> list[Path]:
    """Write the sweep's released table (``sweep.csv``), its page and kept variants.

    A kept variant is written as its study files (``variants/<name>/``) and a full build of
    them (``keep/<name>/``), which ``verify`` accepts; it is built separately, so each costs
    one build. Its ``report.html`` is written too, with the sweep's section. ``sweep.csv``,
    ``sweep.html`` and those reports are suppressed as one linked system of counts over every
    variant (:func:`joint_release`).

    Raises:
        AscertainError: The folder holds foreign files, or a kept variant's build fails.
    """
    from pipeline.outputs.report._sweep import SECTION, sweep_frame, sweep_page, sweep_section
    from pipeline.outputs.report._write import finish_report, read_report
    from pipeline.workflows._sweep_release import joint_release

    options = options or SweepOptions()
    out = out.resolve()
    with staging(out) as staged:
        reports = {
            name: read_report(staged / "keep" / name, _keep(run, name, staged, options))
            for name in options.keep
        }
        base_threshold = run.sweep.base.study.output.small_cell_threshold
        released, hidden, threshold = joint_release(run.rows, base_threshold, reports)
        lines = [",".join(COLUMNS)]
        lines += [",".join(_cell(row[c]) for c in COLUMNS) for row in released]
        (staged / "sweep.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
        facts = sweep_facts(run)
        html = sweep_page(facts, released, threshold)
        (staged / "sweep.html").write_text(html, encoding="utf-8")
        for name, parts in reports.items():
            section = sweep_section(facts, released, threshold, current=name)
            finish_report(parts, hidden[name], {SECTION: (section, sweep_frame(released))})
        kept = {(folder, name) for name in options.keep for folder in ("variants", "keep")}
        names = ["sweep.csv", "sweep.html"]
        names += sorted(
            p.relative_to(staged).as_posix()
            for p in staged.rglob("*")
            if p.is_file() and p.relative_to(staged).parts[:2] in kept
        )
        install(staged, out, SWEEP, names)
    return [out / name for name in names]


def sweep_facts(run: SweepRun) -> SweepFacts:
    """What the sweep's section says about the sweep besides its numbers."""
    sweep = run.sweep
    catalog = sweep.base.catalog
    return SweepFacts(
        name=sweep.name,
        title=sweep.title,
        base_file=sweep.base.file.name,
        overrides=tuple(
            (v.name, tuple(f"{o.target} = {o.value}" for o in v.overrides)) for v in sweep.variants
        ),
        stages_run=len(run.merged.plan.stages),
        stages_alone=run.merged.stages_alone,
        shared=len(run.merged.shared),
        titles={o: catalog.get(o).title for o in sweep.outcomes},
    )


def _keep(run: SweepRun, name: str, staged: Path, options: SweepOptions) -> Path:
    """Write one variant's study files and build them into the staging folder.

    Returns:
        The study file the variant was built from.
    """
    sweep = run.sweep
    inputs, build = staged / "variants" / name, staged / "keep" / name
    if name == BASE:
        study = sweep.base.file
    else:
        study = write_variant_inputs(sweep, sweep.variant(name), inputs, build)
    build_study(study, options.build_options(out=build))
    return study


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return f"{value:.6g}"
    text = str(value)
    return f'"{text}"' if "," in text else text
