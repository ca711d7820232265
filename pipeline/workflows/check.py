"""``ascertain check``'s output, and with ``--extract`` which definitions match no row.

It runs only the part of the plan that finds evidence (sources, measurements, evidence and
their counts), on DuckDB, and writes nothing; ``build`` gives the same warnings from the
counts it computes anyway.
"""

from __future__ import annotations

from collections.abc import Iterable
from pathlib import Path

from pipeline.compile import EVIDENCE_COUNTS, unmatched_definitions
from pipeline.config._check import CheckReport, explain_condition
from pipeline.config._explain_study import explain_study
from pipeline.extract import open_extract
from pipeline.workflows.build import evidence_counts
from pipeline.workflows.prepare import BuildOptions, prepare


def unmatched_in_extract(study_file: Path, extract: Path | str | None = None) -> list[str]:
    """One warning per use of a definition in the study that matches no row of the extract.

    Args:
        study_file: The study.
        extract: The extract to look in (default: the study's own).

    Raises:
        AscertainError: Bad config, a bad extract, an engine failure.
    """
    ready = prepare(study_file, BuildOptions(extract=extract))
    loaded = ready.loaded
    plan = ready.plan.through(EVIDENCE_COUNTS, order=("evidence",))
    with open_extract(ready.extract, plan.sources) as opened:
        run = ready.engine.run(plan, opened.tables)
    unmatched = unmatched_definitions(loaded, evidence_counts(run.outputs[EVIDENCE_COUNTS]))
    return [f"{study_file}: {use.message()}" for use in unmatched]


def check_extract(study_files: Iterable[Path], extract: Path | str) -> list[str]:
    """:func:`unmatched_in_extract` for each study, all on the same extract."""
    return [w for file in study_files for w in unmatched_in_extract(file, extract)]


def check_lines(report: CheckReport, *, explain: bool, data_warnings: list[str]) -> list[str]:
    """What ``check`` prints: explanations, problems, warnings, and a count of each.

    Args:
        report: What :func:`check_paths` found.
        explain: Whether to say what each study and definition means first.
        data_warnings: Warnings found in an extract (``check --extract``).
    """
    lines: list[str] = []
    if explain:
        for study in report.studies.values():
            lines += [explain_study(study), ""]
        for file, condition in report.conditions.items():
            lines += [explain_condition(condition, report.lists.get(file)), ""]
    lines += [str(problem) for problem in report.problems]
    warnings = [f"warning: {w}" for w in (*report.warnings, *data_warnings)]
    summary = f"{len(report.files)} files checked, {len(report.problems)} problems"
    return [*lines, *warnings, summary + (f", {len(warnings)} warnings" if warnings else "")]
