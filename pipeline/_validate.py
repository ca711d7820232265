"""``ascertain validate``: how well a case definition agrees with a reference standard.

The reference is a table of ``patient_id, condition, status[, date]`` (chart review, say) or
the synthetic ground truth ``patient_id, condition, true_onset_date``. Every patient of the
extract's patients table is classified by the definition (a case when a rule is met by the end
of data) and by the reference (a case when its status is true, or its date is on or before the
end of data); the four cells give sensitivity, specificity, predictive values and kappa.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import polars as pl

from pipeline.compile import compile_study
from pipeline.config import load_study
from pipeline.engine import DuckDBEngine
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


@dataclass(frozen=True)
class Validation:
    """One condition's agreement with the reference."""

    condition: str
    accuracy: DiagnosticAccuracy
    onsets: OnsetAgreement


def read_reference(path: Path) -> pl.DataFrame:
    """Read a reference file into ``patient_id, condition, status, date``.

    Raises:
        AscertainError: Unreadable file, or columns that are neither layout.
    """
    try:
        frame = pl.read_parquet(path) if path.suffix == ".parquet" else pl.read_csv(path)
    except (OSError, pl.exceptions.PolarsError) as err:
        raise AscertainError(f"{path}: cannot read the reference: {err}") from err
    columns = set(frame.columns)

    def as_date(name: str) -> pl.Expr:
        if frame.schema[name] == pl.Date:
            return pl.col(name)
        return pl.col(name).cast(pl.String).str.to_date("%Y-%m-%d", strict=False)

    if {"patient_id", "condition", "true_onset_date"} <= columns:
        date = as_date("true_onset_date")
        return frame.select(
            pl.col("patient_id").cast(pl.String),
            pl.col("condition").cast(pl.String),
            date.is_not_null().alias("status"),
            date.alias("date"),
        )
    if {"patient_id", "condition", "status"} <= columns:
        date = as_date("date") if "date" in columns else pl.lit(None, pl.Date)
        status = pl.col("status").cast(pl.String).str.to_lowercase().is_in(["1", "true", "yes"])
        return frame.select(
            pl.col("patient_id").cast(pl.String),
            pl.col("condition").cast(pl.String),
            status.alias("status"),
            date.alias("date"),
        )
    raise AscertainError(
        f"{path}: a reference needs columns patient_id, condition and status (optionally date), "
        f"or patient_id, condition and true_onset_date; found: {', '.join(frame.columns)}"
    )


def validate_study(
    study_file: Path, reference: Path, *, extract: Path | str | None = None
) -> list[Validation]:
    """Compare each outcome of a study with the reference standard.

    Raises:
        AscertainError: Bad config, extract or reference; no outcome in the reference.
    """
    loaded = load_study(study_file)
    plan = compile_study(loaded)
    source = extract or loaded.study.extract
    partial = plan.through("condition_onsets").with_outputs(("patient_base", "condition_onsets"))
    with open_extract(source if isinstance(source, str) else source.resolve(), plan.sources) as x:
        run = DuckDBEngine().run(partial, x.tables)
    patients = pl.from_arrow(run.outputs["patient_base"]).select(
        pl.col("patient_id").cast(pl.String)
    )
    onsets = pl.from_arrow(run.outputs["condition_onsets"]).with_columns(
        pl.col("patient_id").cast(pl.String)
    )
    ref = read_reference(reference)
    end = loaded.study.end_of_data
    results = []
    for condition in loaded.study.outcomes.conditions:
        wanted = ref.filter(pl.col("condition") == condition)
        if wanted.is_empty():
            continue
        case_by_ref = wanted.with_columns(
            (pl.col("status") & (pl.col("date").is_null() | (pl.col("date") <= end))).alias(
                "ref_case"
            )
        ).select("patient_id", "ref_case", pl.col("date").alias("ref_date"))
        joined = (
            patients.join(onsets.select("patient_id", f"onset_{condition}"), "patient_id", "left")
            .join(case_by_ref, "patient_id", "left")
            .with_columns(
                pl.col(f"onset_{condition}").is_not_null().alias("def_case"),
                pl.col("ref_case").fill_null(value=False),
            )
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
        both = joined.filter(
            pl.col("def_case") & pl.col("ref_case") & pl.col("ref_date").is_not_null()
        )
        differences = (both[f"onset_{condition}"] - both["ref_date"]).dt.total_days().to_list()
        results.append(
            Validation(condition, diagnostic_accuracy(**cells), onset_agreement(differences))
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


def validation_cells(results: list[Validation]) -> tuple[dict[str, int], list[Relation], set[str]]:
    """The counts of a validation as cells of the suppression system, with their relations.

    Per condition: the four cells, the definition's and the reference's positives and
    negatives (each the sum of two cells; statistics reveal them), and of the true positives
    those with a reference date whose onsets were compared (``onset_n``), split into those
    within the agreement window and the others. The patients of the extract (``total``) are
    the same for every condition. These are patients of the whole extract judged at the end
    of data, not the sets a build's report counts, so a validation is a system of its own.

    Returns:
        Cell values, relations, and the latent cells (true positives without a reference date,
        never released).
    """
    values: dict[str, int] = {}
    relations: list[Relation] = []
    latent: set[str] = set()
    for r in results:
        a, o, c = r.accuracy, r.onsets, r.condition
        cell = {name: f"{c}|{name}" for name in ("tp", "fp", "fn", "tn")}
        values |= {cell[name]: int(getattr(a, name)) for name in cell}
        values["total"] = a.tp + a.fp + a.fn + a.tn
        relations.append((*((cell[name], 1) for name in cell), ("total", -1)))
        for margin, (x, y) in {
            "def_pos": ("tp", "fp"),
            "def_neg": ("fn", "tn"),
            "ref_pos": ("tp", "fn"),
            "ref_neg": ("fp", "tn"),
        }.items():
            values[f"{c}|{margin}"] = values[cell[x]] + values[cell[y]]
            relations.append(((cell[x], 1), (cell[y], 1), (f"{c}|{margin}", -1)))
        values[f"{c}|onset_n"] = o.n
        values[f"{c}|onset_within"] = o.within
        values[f"{c}|onset_outside"] = o.n - o.within
        values[f"{c}|tp_undated"] = a.tp - o.n
        latent.add(f"{c}|tp_undated")
        relations.append(
            ((f"{c}|onset_n", 1), (f"{c}|tp_undated", 1), (cell["tp"], -1)),
        )
        relations.append(
            ((f"{c}|onset_within", 1), (f"{c}|onset_outside", 1), (f"{c}|onset_n", -1)),
        )
    return values, relations, latent


def render_validation(results: list[Validation], threshold: int) -> str:
    """The agreement as plain text, with small counts suppressed as in the report.

    The counts go through :func:`pipeline.stats.protect_cells` with the relations of
    :func:`validation_cells`: counts from 1 to ``threshold - 1`` are shown as
    ``<threshold``, counts hidden so that those cannot be worked out as ``*``, and every
    statistic computed from a hidden count (its estimate reveals the count) is left out.
    """
    values, relations, latent = validation_cells(results)
    hidden = protect_cells(values, relations, threshold, latent=latent, priority={"total": 1})

    def shown(key: str) -> str:
        if key not in hidden:
            return str(values[key])
        return f"<{threshold}" if 0 < values[key] < threshold else "*"

    lines = []
    for r in results:
        c = r.condition
        cells = ", ".join(f"{name} {shown(f'{c}|{name}')}" for name in ("tp", "fp", "fn", "tn"))
        lines.append(f"{c}: {cells}")
        for label, inputs in _STATISTICS.items():
            value = getattr(r.accuracy, label)
            if any(f"{c}|{name}" in hidden for name in inputs):
                lines.append(f"  {label:<12} suppressed (computed from a hidden count)")
                continue
            lines.append(
                f"  {label:<12} {value.estimate:.3f} (95% CI {value.low:.3f}-{value.high:.3f})"
            )
        o = r.onsets
        if o.n:
            onset = (f"{c}|onset_n", f"{c}|onset_within", f"{c}|onset_outside")
            if o.n < threshold or any(k in hidden for k in onset):
                lines.append(f"  onset dates: suppressed (n {shown(f'{c}|onset_n')})")
            else:
                lines.append(
                    f"  onset dates: median difference {o.median_difference:+.0f} days, "
                    f"{o.share_within.estimate:.1%} within {o.within_days} days (n {o.n})"
                )
    lines.append(
        f"Research use only. Small-cell threshold {threshold}: counts from 1 to {threshold - 1} "
        f"are shown as <{threshold}, counts hidden so that those cannot be worked out as *, "
        "and statistics computed from a hidden count are not shown."
    )
    return "\n".join(lines)
