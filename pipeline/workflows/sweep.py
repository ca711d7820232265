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
from pipeline.engine import StageCallback
from pipeline.extract import open_extract
from pipeline.outputs._ownership import Owner, check_folder, install, staging
from pipeline.workflows._sweep_numbers import COLUMNS, released_rows, sweep_rows
from pipeline.workflows.build import build_study
from pipeline.workflows.prepare import BuildOptions, make_engine, resolve_extract

SWEEP = Owner("sweep", "ascertain-sweep.json")


@dataclass(frozen=True)
class SweepOptions:
    """Command-line overrides: the extract, the output folder, the engine's threads and memory.

    ``keep`` names variants (or ``base``) to write as full build folders as well.
    """

    extract: Path | str | None = None
    out: Path | None = None
    threads: int | None = None
    memory_limit: str | None = None
    keep: tuple[str, ...] = ()


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


def variant_plans(sweep: Sweep) -> dict[str, Plan]:
    """The base's plan and each variant's, keyed by name (``base`` first)."""
    plans = {BASE: compile_study(sweep.base)}
    for variant in sweep.variants:
        plans[variant.name] = compile_study(load_variant(sweep, variant))
    return plans


def run_sweep(
    sweep_file: Path,
    options: SweepOptions | None = None,
    *,
    on_stage: StageCallback | None = None,
) -> SweepRun:
    """Load a sweep, compile every variant and run them all as one plan on DuckDB.

    Raises:
        AscertainError: Bad sweep file or variant (located in the sweep file), a bad extract,
            or an engine failure.
    """
    options = options or SweepOptions()
    sweep = load_sweep(sweep_file)
    for name in options.keep:
        if name != BASE:
            sweep.variant(name)
    plans = variant_plans(sweep)
    merged = merge_plans(plans, ("cohort",))
    study = sweep.base.study
    extract = resolve_extract(options.extract or study.extract)
    engine = make_engine(
        BuildOptions(extract=extract, memory_limit=options.memory_limit),
        options.threads or study.engine.threads,
        options.memory_limit or study.engine.memory_limit,
    )
    with ExitStack() as stack:
        opened = stack.enter_context(open_extract(extract, merged.plan.sources))
        started = time.perf_counter()
        run = engine.run(merged.plan, opened.tables, on_stage=on_stage)
        seconds = time.perf_counter() - started
    cohorts = {key: run.outputs[f"{key}/cohort"] for key in plans}
    rows = sweep_rows(cohorts, sweep.outcomes)
    return SweepRun(sweep, plans, merged, cohorts, seconds, rows)


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
    """Refuse an output folder holding foreign files or overlapping an input, before any work."""
    inputs: list[tuple[str, Path]] = [("sweep file", sweep_file.resolve())]
    if isinstance(extract, Path):
        inputs.append(("extract", extract.resolve()))
    check_folder(out, SWEEP, inputs=inputs)


def write_sweep(run: SweepRun, out: Path, options: SweepOptions | None = None) -> list[Path]:
    """Write the sweep's released table (``sweep.csv``), its report and kept variants.

    ``sweep.csv`` and ``sweep.html`` are suppressed for release (one linked system of counts
    over every variant, :func:`released_rows`). A kept variant is written as its study files
    (``variants/<name>/``) and a full build of them (``keep/<name>/``), which ``verify``
    accepts; it is built separately, so each costs one build.

    Raises:
        AscertainError: The folder holds foreign files, or a kept variant's build fails.
    """
    from pipeline.outputs.report._sweep import render_sweep_html

    options = options or SweepOptions()
    out = out.resolve()
    threshold = run.sweep.base.study.output.small_cell_threshold
    released = released_rows(run.rows, threshold)
    names = ["sweep.csv", "sweep.html"]
    with staging(out) as staged:
        lines = [",".join(COLUMNS)]
        lines += [",".join(_cell(row[c]) for c in COLUMNS) for row in released]
        (staged / "sweep.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
        html = render_sweep_html(run, released, threshold)
        (staged / "sweep.html").write_text(html, encoding="utf-8")
        for name in options.keep:
            names += _keep(run, name, staged, out, options)
        install(staged, out, SWEEP, names)
    return [out / name for name in names]


def _keep(run: SweepRun, name: str, staged: Path, out: Path, options: SweepOptions) -> list[str]:
    """Write one variant's study files and build them into the staging folder."""
    sweep = run.sweep
    inputs, build = staged / "variants" / name, staged / "keep" / name
    if name == BASE:
        study = sweep.base.file
    else:
        study = write_variant_inputs(sweep, sweep.variant(name), inputs, build)
    extract = options.extract
    build_study(
        study,
        BuildOptions(
            extract=extract, out=build, threads=options.threads, memory_limit=options.memory_limit
        ),
    )
    written = [p for p in staged.rglob("*") if p.is_file()]
    return [
        p.relative_to(staged).as_posix()
        for p in written
        if p.relative_to(staged).parts[:2] in {("variants", name), ("keep", name)}
    ]


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return f"{value:.6g}"
    text = str(value)
    return f'"{text}"' if "," in text else text
