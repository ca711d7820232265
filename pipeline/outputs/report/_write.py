"""The study report: summary tables with small-cell suppression, as CSV and one HTML file.

``write_report`` reads a build's output folder and writes ``report.html`` and ``summary/*.csv``.
Every count in them is suppressed as one linked system by :func:`pipeline.stats.protect_cells`
(see :mod:`._suppression` for the cells and relations of the report). The raw build
files next to them (``cohort.parquet`` and the build logs) are the unsuppressed record.

The report is written even when the study and definition files named in the manifest are gone
(a folder copied to a safe haven): it then says what it could not read instead of failing. It
names files relative to the study's folder, never by a path of the machine it ran on.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import polars as pl

from pipeline.compile import names
from pipeline.config import LoadedStudy, load_study
from pipeline.config._check import explain_condition
from pipeline.config._reference_rates import ReferenceRates
from pipeline.errors import AscertainError
from pipeline.outputs._manifest import definition_path, read_manifest, sha256_file
from pipeline.outputs._ownership import REPORT, check_folder, install, staging
from pipeline.outputs.report._at_risk import at_risk_block, render_at_risk
from pipeline.outputs.report._codes import RELEASED_NOTE, codes_summaries, read_audit
from pipeline.outputs.report._curves import Headline, outcome_curves
from pipeline.outputs.report._html import assemble
from pipeline.outputs.report._rates import (
    rates_block,
    rates_summary,
    read_persontime,
    standardised_summary,
)
from pipeline.outputs.report._smr import changed_reference, smr_block, smr_summary
from pipeline.outputs.report._suppression import (
    Block,
    CellSystem,
    masked,
    protect_system,
    report_system,
)
from pipeline.outputs.report._table_one import (
    differenced_means,
    exposure_table_one_blocks,
    exposure_table_one_summary,
    table_one_blocks,
    table_one_summary,
)
from pipeline.outputs.report._tables import (
    check_matched_cases,
    combinations_block,
    dependence_block,
    dependence_summary,
    flow_block,
    incidence_block,
    incidence_summary,
    quality_blocks,
)

__all__ = ["DEFAULT_THRESHOLD", "finish_report", "read_report", "write_report"]

REPORT_PAGE = "report.html"
SUMMARY = "summary"

DEFAULT_THRESHOLD = 5
"""Small-cell threshold used when the study file cannot be read (the study model's default)."""


@dataclass
class Study:
    """What the report knows about the study, with notes on what it could not read.

    ``labels`` holds the covariates' own ``label:`` from the study; the others are named by
    their documented meaning and unit (:func:`column_labels`).
    """

    name: str
    title: str
    threshold: int
    outcomes: tuple[str, ...]
    titles: dict[str, str]
    definitions: list[dict[str, str]] = field(default_factory=list)
    labels: dict[str, str] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    reference: ReferenceRates | None = None
    cases_of: str | None = None
    exposed_in: str | None = None


def _used_conditions(loaded: LoadedStudy) -> tuple[str, ...]:
    study = loaded.study
    names = list(study.outcomes.conditions)
    for cov in study.covariates.values():
        names += [n for n in (cov.condition, cov.days_since_first_evidence) if n]
    names += [c.not_prevalent for c in study.eligibility if c.not_prevalent]
    event = study.index.first_event
    if event is not None and event.condition:
        names.append(event.condition)
    return loaded.catalog.with_references(tuple(dict.fromkeys(names)))


def locate_study(
    output_dir: Path, manifest: dict[str, Any], study: Path | None
) -> tuple[Path | None, str]:
    """The study file to read (``study``, else the manifest's hint from the output folder).

    Returns:
        The path, or ``None`` when the manifest holds no hint; and the study's file name.
    """
    name = str((manifest.get("study") or [{}])[0].get("path", "study.yaml"))
    if study is not None:
        return study, name
    hint = manifest.get("locations", {}).get("study_from_output")
    return (output_dir.resolve() / hint if hint else None), name


def read_study(
    manifest: dict[str, Any], cohort: pl.DataFrame, output_dir: Path, study: Path | None = None
) -> Study:
    """Load the build's study; fall back to the cohort's columns if it cannot be found.

    The report must still be written when the YAML files moved (e.g. a folder copied to a
    safe-haven), so a missing or invalid study only adds a note. Notes and definition paths
    name files relative to the study's folder, never by a path of this machine.
    """
    fallback = tuple(
        c.removeprefix(names.AT_RISK_PREFIX)
        for c in cohort.columns
        if c.startswith(names.AT_RISK_PREFIX)
    )
    path, name = locate_study(output_dir, manifest, study)
    stem = Path(name).stem
    base = Study(stem, stem, DEFAULT_THRESHOLD, fallback, {o: o for o in fallback})
    reason = ""
    if path is None:
        reason = "the manifest does not say where it is; name it with --study"
    elif not path.is_file():
        reason = "it is not there; name it with --study"
    else:
        try:
            loaded = load_study(path)
        except (AscertainError, OSError):
            reason = "it no longer loads; run ascertain check on it"
    if reason:
        base.notes.append(
            f"The study file {name} could not be read ({reason}), so condition titles and "
            "definition provenance are not shown and the default small-cell threshold of "
            f"{DEFAULT_THRESHOLD} is used."
        )
        return base
    entry = manifest["study"][0]
    if entry.get("sha256") and sha256_file(loaded.file) != entry["sha256"]:
        base.notes.append(f"The study file {name} has changed since the build.")
    hashes = {d["path"]: d["sha256"] for d in manifest.get("definitions", [])}
    definitions = []
    for condition_name in _used_conditions(loaded):
        file = loaded.catalog.files[condition_name]
        shown = definition_path(file, loaded.file, library=loaded.study.library)
        current = sha256_file(file) if file.is_file() else ""
        if hashes.get(shown) not in (None, current):
            base.notes.append(f"The definition file {shown} has changed since the build.")
        condition = loaded.catalog.get(condition_name)
        # The rules in the words of `ascertain check --explain`, without the title the heading
        # already shows: what makes a case, not only what the author wrote about it.
        lists = loaded.catalog.code_lists.get(condition_name)
        rules = explain_condition(condition, lists).removeprefix(
            f"{condition.title} ({condition_name}): "
        )
        definitions.append(
            {
                "name": condition_name,
                "title": condition.title,
                "about": condition.about.strip(),
                "rules": rules[:1].upper() + rules[1:],
                "path": shown,
                "sha256": hashes.get(shown, current),
            }
        )
    study_model = loaded.study
    base.notes += changed_reference(manifest, loaded)
    return Study(
        name=study_model.study,
        title=study_model.title,
        threshold=study_model.output.small_cell_threshold,
        outcomes=tuple(study_model.outcomes.conditions),
        titles={d["name"]: d["title"] for d in definitions},
        definitions=definitions,
        notes=base.notes,
        labels={n: c.label for n, c in study_model.covariates.items() if c.label},
        reference=loaded.reference_rates,
        cases_of=study_model.matching.cases_of if study_model.matching else None,
        exposed_in=study_model.matching.exposed_in if study_model.matching else None,
    )


def read_json(path: Path) -> dict[str, Any]:
    """A JSON file, or an empty mapping when it is missing (run.json is optional)."""
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return {}
    return data if isinstance(data, dict) else {}


def column_labels(output_dir: Path, own: dict[str, str]) -> dict[str, str]:
    """How tables for readers name the analysis-table columns: the one place labels are chosen.

    A covariate's own ``label:`` from the study (``own``) wins; every other column is named by
    its documented meaning and unit in ``dictionary.csv`` (if present), which names a
    condition's columns by the condition's ``title:`` ("Heart failure on or before the index
    date"): a condition's title is its label, there is no second name for it.
    """
    try:
        dictionary = pl.read_csv(output_dir / "dictionary.csv", infer_schema_length=0)
    except (OSError, pl.exceptions.PolarsError):
        return dict(own)
    labels = {}
    for r in dictionary.iter_rows(named=True):
        meaning = r.get("meaning") or r["column"]
        text = meaning[:1].upper() + meaning[1:]
        labels[r["column"]] = f"{text} ({r['unit']})" if r.get("unit") else text
    return labels | own


def with_headline_time(incidence: pl.DataFrame, headlines: dict[str, Headline]) -> pl.DataFrame:
    """Add when each cumulative incidence is estimated (years), empty where it is left out."""
    years = [
        None
        if row["cumulative_incidence_percent"] is None or math.isnan(headlines[row["outcome"]].days)
        else round(headlines[row["outcome"]].years, 2)
        for row in incidence.iter_rows(named=True)
    ]
    columns = incidence.columns
    at = columns.index("ci_high_percent") + 1
    order = [*columns[:at], "cumulative_incidence_years", *columns[at:]]
    return incidence.with_columns(
        pl.Series("cumulative_incidence_years", years, dtype=pl.Float64)
    ).select(order)


def matched_outcome(
    output_dir: Path, cohort: pl.DataFrame, attrition: pl.DataFrame, study: Study
) -> str | None:
    """The outcome whose incident cases the build matched; None when the log has no sets line.

    From the study; when the study file could not be read, from the cases of
    ``matched.parquet``: the outcome whose incident cases in the cohort are exactly those
    patients. The flow's sets line must be tied to it (see ``flow_block``), so a report that
    cannot tell refuses rather than print the line untied.

    Raises:
        AscertainError: The log has matching lines but neither the study nor matched.parquet
            says which outcome they count.
    """
    if study.cases_of is not None or "match_cases" not in attrition["step"].to_list():
        return study.cases_of
    if (output_dir / "matched.parquet").is_file():
        matched = pl.read_parquet(output_dir / "matched.parquet", columns=["role", "patient_id"])
        cases = set(matched.filter(pl.col("role") == "case")["patient_id"].cast(pl.String))
        for o in study.outcomes:
            columns = names.outcome_columns(o)
            incident = cohort.filter(
                pl.col(columns.at_risk) & pl.col(columns.incident).fill_null(value=False)
            )
            if set(incident["patient_id"].cast(pl.String)) == cases:
                return o
    raise AscertainError(
        f"{output_dir / 'attrition.csv'}: the matching lines cannot be tied to an outcome "
        "without the study file or matched.parquet; name the study with --study"
    )


def matched_group(output_dir: Path, cohort: pl.DataFrame, study: Study) -> str | None:
    """The exposure group whose new users opened the sets (``exposed_in``), if any.

    From the study; when the study file could not be read, from ``matched.parquet``: the one
    exposure of the cohort patients who open its sets. None when the build has no such sets.
    """
    if study.exposed_in is not None or not (output_dir / "matched.parquet").is_file():
        return study.exposed_in
    matched = pl.read_parquet(output_dir / "matched.parquet", columns=["role", "patient_id"])
    exposed = matched.filter(pl.col("role") == "exposed")["patient_id"]
    if exposed.is_empty() or names.EXPOSURE not in cohort.columns:
        return None
    groups = cohort.filter(pl.col("patient_id").is_in(exposed.implode()))[names.EXPOSURE]
    return groups[0] if groups.n_unique() == 1 else None


@dataclass
class ReportParts:
    """A build folder's report before suppression: its tables as blocks, and their system.

    :func:`read_report` makes it, :func:`finish_report` writes it with the hidden keys chosen
    (by :func:`write_report` from the report's system alone, by the sweep from its system
    joined with the sweep's).
    """

    output_dir: Path
    manifest: dict[str, Any]
    study: Study
    cohort: pl.DataFrame
    flow: Block
    t1: dict[str, Any]
    results: list[Any]
    incidence: Block
    combos: Block
    dependence: Block
    quality_parts: list[Block]
    at_risk: Block
    persontime: pl.DataFrame | None
    rates: Block | None
    system: CellSystem
    t1x: tuple[Any, ...] | None = None  # a new-user study's Table 1 by exposure group
    smr: Block | None = None  # the SMR counts, when the study names reference rates


def write_report(output_dir: Path, study_file: Path | None = None) -> list[Path]:
    """Write ``report.html`` and the suppressed ``summary/*.csv`` tables of a build.

    The files are written beside the build's and listed in ``ascertain-report.json``; a
    later report replaces only those, and a rebuild of the folder removes them (they would
    describe the previous cohort). A ``report.html`` or ``summary/`` file the tool did not
    write, or any other foreign file in the folder, makes it refuse before any work.

    Args:
        output_dir: A folder written by ``ascertain build``.
        study_file: The study file, when it is not where the manifest's hint says (the study
            relative to the output folder; there is no hint when the two are far apart).

    Returns:
        The report's files (not its record), sorted.

    Raises:
        AscertainError: The folder has no manifest or lacks a build file.
        OutputFolderError: The folder holds files ascertain did not write there.
    """
    parts = read_report(output_dir, study_file)
    cells = protect_system(parts.system, parts.study.threshold)
    return finish_report(parts, parts.system.hidden(cells))


def read_report(output_dir: Path, study_file: Path | None = None) -> ReportParts:
    """Read a build folder and make the report's tables as blocks (nothing suppressed yet).

    Raises:
        AscertainError: The folder has no manifest or lacks a build file.
        OutputFolderError: The folder holds files ascertain did not write there.
    """
    output_dir = Path(output_dir)
    manifest = read_manifest(output_dir)
    check_folder(output_dir, REPORT)
    try:
        cohort = pl.read_parquet(output_dir / "cohort.parquet")
        attrition = pl.read_csv(output_dir / "attrition.csv", infer_schema_length=0)
        quality = pl.read_csv(output_dir / "quality.csv", infer_schema_length=0)
    except (OSError, pl.exceptions.PolarsError) as err:
        raise AscertainError(f"{output_dir}: cannot read the build outputs: {err}") from err
    counts = ("patients_before", "removed", "remaining")
    attrition = attrition.with_columns(pl.col(c).cast(pl.Int64) for c in counts)
    study = read_study(manifest, cohort, output_dir, study_file)
    outcomes, t = study.outcomes, study.threshold
    flow = flow_block(
        attrition,
        cohort.height,
        matched_outcome(output_dir, cohort, attrition, study),
        exposed_in=matched_group(output_dir, cohort, study),
    )
    t1 = {o: table_one_blocks(cohort, o) for o in outcomes}
    # a new-user study: Table 1 by the group started at index, in the same suppression system
    t1x = exposure_table_one_blocks(cohort) if names.EXPOSURE in cohort.columns else None
    results, incidence = incidence_block(cohort, outcomes)
    check_matched_cases(flow, incidence)
    combos = combinations_block(cohort, outcomes)
    dependence = dependence_block(cohort, outcomes)
    quality_parts = quality_blocks(quality)
    at_risk = at_risk_block(cohort, outcomes)
    blocks = [flow, *(b for _, *pair in t1.values() for b in pair), incidence, combos, dependence]
    blocks += list(t1x[1:]) if t1x is not None else []
    persontime = read_persontime(output_dir)  # rates only when the build wrote person-time
    rates = smr = None
    if persontime is not None:
        rates = rates_block(persontime, outcomes, {ci.outcome: ci.events for _, ci, *_ in results})
        blocks.append(rates)
        if study.reference is not None:  # the study names reference rates: SMRs
            smr = smr_block(persontime, cohort, study.reference, rates)
            blocks.append(smr)
    system = report_system([*blocks, at_risk, *quality_parts], t, cohort, outcomes)
    return ReportParts(
        output_dir, manifest, study, cohort, flow, t1, results, incidence, combos, dependence,
        quality_parts, at_risk, persontime, rates, system, t1x, smr,
    )  # fmt: skip


def finish_report(
    parts: ReportParts,
    hidden: frozenset[str],
    extra: dict[str, tuple[str, pl.DataFrame]] | None = None,
) -> list[Path]:
    """Write the report of :func:`read_report` with the counts of ``hidden`` hidden.

    Args:
        parts: The report's tables.
        hidden: The printed keys to hide (``parts.system.hidden`` of the chosen cells).
        extra: Optional sections by id (``sweep``): their HTML and their released table,
            written as ``summary/<id>.csv``; suppressed by the caller in one system with
            ``hidden``.

    Returns:
        The report's files (not its record), sorted.
    """
    output_dir, study, cohort = parts.output_dir, parts.study, parts.cohort
    outcomes, t = study.outcomes, study.threshold
    flow, t1, combos, dependence = parts.flow, parts.t1, parts.combos, parts.dependence
    persontime, rates, at_risk = parts.persontime, parts.rates, parts.at_risk
    t1x, smr = parts.t1x, parts.smr
    curves = {o: outcome_curves(cohort, o, t) for o in outcomes if f"events|{o}" not in hidden}
    # The headline cumulative incidence is the released curve's value at its last step, not
    # the full estimate at the horizon beside it (see _curves on why).
    none = Headline(math.nan, math.nan, math.nan, math.nan)
    headlines = {o: curves[o].headline if o in curves else none for o in outcomes}
    results = [(o, ci, headlines[o], rate) for o, ci, _, rate in parts.results]
    longs = [long for long, *_ in t1.values()] + ([t1x[0]] if t1x is not None else [])
    no_means = differenced_means(longs, t)
    summaries = {
        "flow": masked(flow, hidden, t),
        "table_one": pl.concat(
            [
                table_one_summary(o, long, blocks, hidden, t, no_means)
                for o, (long, *blocks) in t1.items()
            ]
        ),
        "incidence": with_headline_time(
            incidence_summary(results, study.titles, hidden, t), headlines
        ),
        "combinations": masked(combos, hidden, t),
        "dependence": dependence_summary(dependence, hidden, t),
    }
    if t1x is not None:
        long, *groups = t1x
        summaries["table_one_by_exposure"] = exposure_table_one_summary(
            long, groups, hidden, t, no_means
        )
    if persontime is not None and rates is not None:
        summaries["rates"] = rates_summary(rates, hidden, t)
        summaries["standardised_rates"] = standardised_summary(rates, hidden)
        if study.reference is not None and smr is not None:
            summaries["smr"] = smr_summary(smr, study.reference, hidden, t)
    audit = read_audit(output_dir)  # the codes section only when `codes` wrote here
    if audit is not None and audit[1]:
        study.notes.append(RELEASED_NOTE)
    elif audit is not None:
        summaries.update(codes_summaries(audit[0], t))
    extra = extra or {}
    summaries.update({name: frame for name, (_, frame) in extra.items()})
    html = assemble(
        study=study,
        manifest=parts.manifest,
        run=read_json(output_dir / "run.json"),
        summaries=summaries,
        quality=pl.concat([masked(b, hidden, t) for b in parts.quality_parts]),
        curves={o: c.years() for o, c in curves.items()},
        at_risk={o: render_at_risk(at_risk, o, hidden, t) for o in curves},
        labels=column_labels(output_dir, study.labels),
        sections={name: html for name, (html, _) in extra.items()},
    )
    files = [REPORT_PAGE, *(f"{SUMMARY}/{name}.csv" for name in sorted(summaries))]
    with staging(output_dir) as staged:
        (staged / SUMMARY).mkdir()
        for name, frame in summaries.items():
            frame.write_csv(staged / SUMMARY / f"{name}.csv", line_terminator="\n")
        (staged / REPORT_PAGE).write_text(html, encoding="utf-8")
        install(staged, output_dir, REPORT, files)
    return sorted(output_dir / name for name in files)
