"""``ascertain validate``: how well a case definition agrees with a reference standard.

The reference (:mod:`pipeline.workflows._reference`) lists patients with their true status
and declares its coverage. Each patient is classified by the definition (a case when a rule
is met by the end of data) and by the reference (a case when its status is true and its date,
if any, is on or before the end of data). With ``coverage: complete`` every patient of the
extract counts (a patient without a row is a true negative); with ``coverage: reviewed`` only
the listed patients do: the unreviewed are in no denominator. When a reviewed sample was drawn
by definition status, sensitivity and specificity are corrected for verification bias
(:func:`pipeline.stats.verification_corrected`, Begg and Greenes 1983).

Onset agreement compares dated reference onsets with the definition's, for patients both call
cases, except reference onsets before the start of the extract (its earliest encounter): no
definition can date an onset before the records begin, so those pairs would only measure the
extract's start. They are counted and reported as left out.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from pathlib import Path

import polars as pl

from pipeline.compile import Plan, names
from pipeline.errors import AscertainError
from pipeline.extract import open_extract
from pipeline.stats import (
    DiagnosticAccuracy,
    OnsetAgreement,
    diagnostic_accuracy,
    onset_agreement,
    protect_cells,
)
from pipeline.stats._disclosure import Relation
from pipeline.stats._disclosure import shown as shown_count
from pipeline.stats._verification import CorrectedAccuracy, verification_corrected
from pipeline.workflows._reference import Reference, read_reference
from pipeline.workflows.prepare import BuildOptions, prepare

__all__ = ["Validation", "render_validation", "validate_study", "validation_cells"]


@dataclass(frozen=True)
class Validation:
    """One condition's agreement with the reference.

    Attributes:
        condition: The outcome's name.
        accuracy: The four cells of the patients counted (all, or the reviewed) and measures.
        onsets: Onset agreement of the compared pairs.
        coverage: The reference's coverage (``complete`` or ``reviewed``).
        sampling: ``simple`` or ``by_definition``.
        patients: Patients of the extract.
        positives: Definition positives among them (``N+``; the rest are ``N-``).
        corrected: Begg-Greenes sensitivity and specificity, with ``by_definition`` sampling.
        early: Reference onsets before the start of the extract, left out of ``onsets``.
        extract_start: The extract's earliest encounter date.
    """

    condition: str
    accuracy: DiagnosticAccuracy
    onsets: OnsetAgreement
    coverage: str = "complete"
    sampling: str = "simple"
    patients: int = 0
    positives: int = 0
    corrected: CorrectedAccuracy | None = None
    early: int = 0
    extract_start: dt.date | None = None


def _through(plan: Plan, names: tuple[str, ...]) -> Plan:
    """The smallest plan computing every stage of ``names``, with those as its outputs."""
    needed = set(names)
    for stage in reversed(plan.stages):
        if stage.name in needed:
            needed.update(stage.depends_on)
    return Plan(
        study=plan.study,
        sources=tuple(s for s in plan.sources if s.relation in needed),
        stages=tuple(s for s in plan.stages if s.name in needed),
        outputs=tuple((name, name, ()) for name in names),
    )


def _check_patients(reference: Reference, patients: pl.DataFrame, path: Path) -> None:
    unknown = reference.rows.join(patients, "patient_id", "anti")
    if unknown.height:
        r = unknown.row(0, named=True)
        raise AscertainError(
            f"{path}:{reference.where} {r['line']}: patient {r['patient_id']} is not in the "
            "extract's patients table"
        )


def validate_study(
    study_file: Path,
    reference: Path,
    *,
    extract: Path | str | None = None,
    coverage: str | None = None,
    sampling: str | None = None,
) -> list[Validation]:
    """Compare each outcome of a study with the reference standard.

    Args:
        study_file: The study file.
        reference: The reference file (see :mod:`pipeline.workflows._reference`).
        extract: An extract (folder, mapping file or connection URI) instead of the study's;
            read on DuckDB with the study's ``engine:`` settings, as a build.
        coverage: ``complete`` or ``reviewed``, when the file does not declare it.
        sampling: ``simple`` or ``by_definition``, when the file does not declare it.

    Raises:
        AscertainError: Bad config, extract or reference (a bad row names its line); a
            reference patient not in the extract; no outcome in the reference.
    """
    ready = prepare(study_file, BuildOptions(extract=extract))
    loaded, plan = ready.loaded, ready.plan
    ref = read_reference(reference, coverage=coverage, sampling=sampling)
    wanted = (names.PATIENT_BASE, names.CONDITION_ONSETS, names.ENCOUNTER_SUMMARY)
    with open_extract(ready.extract, plan.sources) as x:
        run = ready.engine.run(_through(plan, wanted), x.tables)
    patients = pl.from_arrow(run.outputs[names.PATIENT_BASE]).select(
        pl.col("patient_id").cast(pl.String)
    )
    onsets = pl.from_arrow(run.outputs[names.CONDITION_ONSETS]).with_columns(
        pl.col("patient_id").cast(pl.String)
    )
    starts = pl.from_arrow(run.outputs[names.ENCOUNTER_SUMMARY])["first_encounter"]
    start = starts.min() if starts.len() else None
    _check_patients(ref, patients, reference)
    end = loaded.study.end_of_data
    results = []
    for condition in loaded.study.outcomes.conditions:
        rows = ref.rows.filter(pl.col("condition") == condition)
        if rows.is_empty():
            continue
        case_by_ref = rows.with_columns(
            (pl.col("status") & (pl.col("date").is_null() | (pl.col("date") <= end))).alias(
                "ref_case"
            )
        ).select("patient_id", "ref_case", pl.col("date").alias("ref_date"))
        classified = patients.join(
            onsets.select("patient_id", names.onset_column(condition)), "patient_id", "left"
        ).with_columns(pl.col(names.onset_column(condition)).is_not_null().alias("def_case"))
        how = "left" if ref.coverage == "complete" else "inner"
        joined = classified.join(case_by_ref, "patient_id", how).with_columns(
            pl.col("ref_case").fill_null(value=False)
        )
        cells = {
            name: joined.filter(rule).height
            for name, rule in {
                "tp": pl.col("def_case") & pl.col("ref_case"),
                "fp": pl.col("def_case") & ~pl.col("ref_case"),
                "fn": ~pl.col("def_case") & pl.col("ref_case"),
                "tn": ~pl.col("def_case") & ~pl.col("ref_case"),
            }.items()
        }
        positives = int(classified["def_case"].sum())
        both = joined.filter(
            pl.col("def_case") & pl.col("ref_case") & pl.col("ref_date").is_not_null()
        )
        early = both.filter(pl.col("ref_date") < start) if start is not None else both.clear()
        compared = both.join(early.select("patient_id"), "patient_id", "anti")
        differences = (
            compared[names.onset_column(condition)] - compared["ref_date"]
        ).dt.total_days()
        corrected = None
        if ref.sampling == "by_definition":
            corrected = verification_corrected(
                **cells, positives=positives, negatives=patients.height - positives
            )
        results.append(
            Validation(
                condition,
                diagnostic_accuracy(**cells),
                onset_agreement(differences.to_list()),
                coverage=ref.coverage,
                sampling=ref.sampling,
                patients=patients.height,
                positives=positives,
                corrected=corrected,
                early=early.height,
                extract_start=start,
            )
        )
    if not results:
        raise AscertainError(
            f"{reference}: no rows for the study's outcomes "
            f"({', '.join(loaded.study.outcomes.conditions)})"
        )
    return results


_STATISTICS = {  # each statistic and the cells it is computed from
    "sensitivity": ("tp", "fn"),
    "specificity": ("tn", "fp"),
    "ppv": ("tp", "fp"),
    "npv": ("tn", "fn"),
    "kappa": ("tp", "fp", "fn", "tn"),
}
_CORRECTED = ("tp", "fp", "fn", "tn", "extract_pos", "extract_neg")


def _unreviewed(r: Validation, values: dict[str, int], latent: set[str]) -> list[Relation]:
    """Cells of a reviewed sample: the extract's definition strata and their unreviewed rest."""
    c = r.condition
    values[f"{c}|extract_pos"] = r.positives
    values[f"{c}|extract_neg"] = r.patients - r.positives
    relations: list[Relation] = [((f"{c}|extract_pos", 1), (f"{c}|extract_neg", 1), ("total", -1))]
    for side, part in (("pos", "def_pos"), ("neg", "def_neg")):  # the unreviewed
        values[f"{c}|unreviewed_{side}"] = values[f"{c}|extract_{side}"] - values[f"{c}|{part}"]
        latent.add(f"{c}|unreviewed_{side}")
        relations.append(
            (
                (f"{c}|{part}", 1),
                (f"{c}|unreviewed_{side}", 1),
                (f"{c}|extract_{side}", -1),
            )
        )
    if r.corrected is None:  # printed only when the correction uses them
        latent |= {f"{c}|extract_pos", f"{c}|extract_neg"}
    return relations


def validation_cells(results: list[Validation]) -> tuple[dict[str, int], list[Relation], set[str]]:
    """The counts of a validation as cells of the suppression system, with their relations.

    Per condition: the four cells of the patients counted, the definition's and the
    reference's positives and negatives among them (each the sum of two cells; statistics
    reveal them), the patients counted (``counted``), the definition's positives and negatives
    in the whole extract (``extract_pos``, ``extract_neg``: printed with ``by_definition``
    sampling, whose correction reveals them; latent otherwise), and of the true positives those
    with a reference date whose onsets were compared (``onset_n``, split into those within the
    agreement window and the others) or left out as before the extract's start
    (``onset_early``). The patients of the extract (``total``) are the same for every
    condition. These are patients of the whole extract judged at the end of data, not the sets
    a build's report counts, so a validation is a system of its own.

    Returns:
        Cell values, relations, and the latent cells (never released).
    """
    values: dict[str, int] = {}
    relations: list[Relation] = []
    latent: set[str] = set()
    for r in results:
        a, o, c = r.accuracy, r.onsets, r.condition
        cell = {name: f"{c}|{name}" for name in ("tp", "fp", "fn", "tn")}
        values |= {cell[name]: int(getattr(a, name)) for name in cell}
        values["total"] = r.patients
        values[f"{c}|counted"] = a.tp + a.fp + a.fn + a.tn
        relations.append((*((cell[name], 1) for name in cell), (f"{c}|counted", -1)))
        for margin, (x, y) in {
            "def_pos": ("tp", "fp"),
            "def_neg": ("fn", "tn"),
            "ref_pos": ("tp", "fn"),
            "ref_neg": ("fp", "tn"),
        }.items():
            values[f"{c}|{margin}"] = values[cell[x]] + values[cell[y]]
            relations.append(((cell[x], 1), (cell[y], 1), (f"{c}|{margin}", -1)))
        if r.coverage == "complete":  # every patient counted: a reader knows counted = total
            relations.append(((f"{c}|counted", 1), ("total", -1)))
        else:
            relations += _unreviewed(r, values, latent)
        values[f"{c}|onset_n"] = o.n
        values[f"{c}|onset_within"] = o.within
        values[f"{c}|onset_outside"] = o.n - o.within
        values[f"{c}|onset_early"] = r.early
        values[f"{c}|tp_undated"] = a.tp - o.n - r.early
        latent.add(f"{c}|tp_undated")
        relations.append(
            (
                (f"{c}|onset_n", 1),
                (f"{c}|onset_early", 1),
                (f"{c}|tp_undated", 1),
                (cell["tp"], -1),
            ),
        )
        relations.append(
            ((f"{c}|onset_within", 1), (f"{c}|onset_outside", 1), (f"{c}|onset_n", -1)),
        )
    return values, relations, latent


def _design(r: Validation, shown: dict[str, str]) -> str:
    c = r.condition
    if r.coverage == "complete":
        return f"  every patient of the extract counted ({shown['total']}; coverage complete)"
    text = f"  reviewed {shown[f'{c}|counted']} of {shown['total']} patients (coverage reviewed"
    if r.corrected is None:
        return text + "; the unreviewed are in no count)"
    return (
        text + "; sampled by definition status from "
        f"{shown[f'{c}|extract_pos']} definition positives and "
        f"{shown[f'{c}|extract_neg']} negatives)"
    )


def _corrected_lines(r: Validation, hidden: frozenset[str]) -> list[str]:
    """Begg-Greenes sensitivity and specificity, unless a count they use is hidden."""
    if r.corrected is None:
        return []
    c, lines = r.condition, []
    gone = any(f"{c}|{name}" in hidden for name in _CORRECTED)
    for label in ("sensitivity", "specificity"):
        value = getattr(r.corrected, label)
        if gone:
            lines.append(f"  {label:<12} suppressed (computed from a hidden count)")
            continue
        limits = "not estimable" if value.low != value.low else f"{value.low:.3f}-{value.high:.3f}"
        lines.append(
            f"  {label:<12} {value.estimate:.3f} (95% CI {limits}), corrected for "
            "verification bias (Begg-Greenes; logit delta-method interval)"
        )
    return [*lines, "  kappa        not shown: it depends on the sampling design"]


def _onset_lines(
    r: Validation, shown: dict[str, str], hidden: frozenset[str], threshold: int
) -> list[str]:
    """Onset agreement, and the reference onsets before the extract that were left out."""
    c, o, lines = r.condition, r.onsets, []
    if o.n:
        onset = (f"{c}|onset_n", f"{c}|onset_within", f"{c}|onset_outside")
        if o.n < threshold or any(k in hidden for k in onset):
            lines.append(f"  onset dates: suppressed (n {shown[f'{c}|onset_n']})")
        else:
            lines.append(
                f"  onset dates: median difference {o.median_difference:+.0f} days, "
                f"{o.share_within.estimate:.1%} within {o.within_days} days (n {o.n})"
            )
    if r.early:
        lines.append(
            f"  onset dates: {shown[f'{c}|onset_early']} reference onsets before the start "
            f"of the extract ({r.extract_start}) not compared"
        )
    return lines


def render_validation(results: list[Validation], threshold: int) -> str:
    """The agreement as plain text, with small counts suppressed as in the report.

    The counts go through :func:`pipeline.stats.protect_cells` with the relations of
    :func:`validation_cells`: counts from 1 to ``threshold - 1`` are shown as
    ``<threshold``, counts hidden so that those cannot be worked out as ``*``, and every
    statistic computed from a hidden count (its estimate reveals the count) is left out.
    """
    values, relations, latent = validation_cells(results)
    hidden = protect_cells(values, relations, threshold, latent=latent, priority={"total": 1})

    # The report's own marking of hidden counts (pipeline.stats._disclosure.shown).
    shown = {k: shown_count(values[k], k, hidden, threshold) for k in values if k not in latent}
    lines = []
    for r in results:
        c = r.condition
        cells = ", ".join(f"{name} {shown[f'{c}|{name}']}" for name in ("tp", "fp", "fn", "tn"))
        lines += [f"{c}: {cells}", _design(r, shown)]
        statistics = dict(_STATISTICS)
        if r.corrected is not None:  # biased by the design; corrected values come below
            statistics = {k: v for k, v in statistics.items() if k in ("ppv", "npv")}
        for label, inputs in statistics.items():
            value = getattr(r.accuracy, label)
            if any(f"{c}|{name}" in hidden for name in inputs):
                lines.append(f"  {label:<12} suppressed (computed from a hidden count)")
                continue
            lines.append(
                f"  {label:<12} {value.estimate:.3f} (95% CI {value.low:.3f}-{value.high:.3f})"
            )
        lines += _corrected_lines(r, hidden)
        lines += _onset_lines(r, shown, hidden, threshold)
    lines.append(
        f"Research use only. Small-cell threshold {threshold}: counts from 1 to {threshold - 1} "
        f"are shown as <{threshold}, counts hidden so that those cannot be worked out as *, "
        "and statistics computed from a hidden count are not shown."
    )
    return "\n".join(lines)
