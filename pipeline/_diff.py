"""``ascertain diff``: what changed between two builds, patient by patient, and why.

The usual question is "what did my definition change do": which patients entered or left the
cohort (and at which eligibility step), and, per outcome, whose rule is newly met or no longer
met, whose onset moved, and who became or stopped being incident.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import polars as pl

from pipeline.errors import AscertainError

SAMPLE = 5


@dataclass
class Change:
    """One kind of change with how many patients it concerns and a few of their ids."""

    what: str
    count: int
    sample: list[str]


@dataclass
class RunDiff:
    """The differences between two output folders."""

    attrition: list[dict[str, object]] = field(default_factory=list)
    cohort: list[Change] = field(default_factory=list)
    outcomes: dict[str, list[Change]] = field(default_factory=dict)

    @property
    def identical(self) -> bool:
        """Whether nothing changed."""
        changed = [c for c in self.cohort if c.count] + [
            c for changes in self.outcomes.values() for c in changes if c.count
        ]
        return not changed and all(row["change"] == 0 for row in self.attrition)


def _read(folder: Path, name: str) -> pl.DataFrame:
    path = folder / name
    if not path.is_file():
        raise AscertainError(f"{path}: not found; is {folder} an output folder of ascertain build?")
    return pl.read_csv(path) if name.endswith(".csv") else pl.read_parquet(path)


def _change(what: str, ids: pl.Series) -> Change:
    values = sorted(str(v) for v in ids.to_list())
    return Change(what, len(values), values[:SAMPLE])


def _attrition(a: pl.DataFrame, b: pl.DataFrame) -> list[dict[str, object]]:
    joined = a.select("step", pl.col("remaining").alias("a")).join(
        b.select("step", pl.col("remaining").alias("b")), on="step", how="full", coalesce=True
    )
    return [
        {"step": r["step"], "a": r["a"], "b": r["b"], "change": (r["b"] or 0) - (r["a"] or 0)}
        for r in joined.iter_rows(named=True)
    ]


def _membership(
    cohort_a: pl.DataFrame, cohort_b: pl.DataFrame, pop_a: pl.DataFrame, pop_b: pl.DataFrame
) -> list[Change]:
    gained = cohort_b.join(cohort_a, on="patient_id", how="anti").select("patient_id")
    lost = cohort_a.join(cohort_b, on="patient_id", how="anti").select("patient_id")
    changes = []
    for label, patients, other in (("entered", gained, pop_a), ("left", lost, pop_b)):
        reasons = patients.join(other, on="patient_id", how="left").with_columns(
            pl.when(pl.col("index_date").is_null())
            .then(pl.lit("not in the source population"))
            .otherwise(pl.col("excluded_at"))
            .alias("reason")
        )
        side = "before" if label == "entered" else "now"
        for reason, group in sorted(reasons.group_by("reason"), key=lambda g: str(g[0][0])):
            text = f"{label} the cohort (excluded {side} at: {reason[0]})"
            changes.append(_change(text, group["patient_id"]))
    return changes


def _true(flag: pl.Expr) -> pl.Expr:
    return flag.fill_null(value=False)


def _false(flag: pl.Expr) -> pl.Expr:
    return flag.fill_null(value=False).not_()


def _outcome_changes(both: pl.DataFrame, name: str) -> list[Change]:
    onset_a, onset_b = pl.col(f"onset_{name}"), pl.col(f"onset_{name}_b")
    incident_a, incident_b = pl.col(f"incident_{name}"), pl.col(f"incident_{name}_b")
    rules = {
        "rule newly met": onset_a.is_null() & onset_b.is_not_null(),
        "rule no longer met": onset_a.is_not_null() & onset_b.is_null(),
        "onset moved": onset_a.is_not_null() & onset_b.is_not_null() & (onset_a != onset_b),
        "became incident": _false(incident_a) & _true(incident_b),
        "no longer incident": _true(incident_a) & _false(incident_b),
    }
    return [_change(what, both.filter(rule)["patient_id"]) for what, rule in rules.items()]


def diff_runs(run_a: Path, run_b: Path) -> RunDiff:
    """Compare two output folders of the same kind of study.

    Raises:
        AscertainError: A folder lacks the files ``ascertain build`` writes.
    """
    cohort_a, cohort_b = _read(run_a, "cohort.parquet"), _read(run_b, "cohort.parquet")
    outcomes = [c.removeprefix("onset_") for c in cohort_a.columns if c.startswith("onset_")]
    outcomes = [o for o in outcomes if f"onset_{o}" in cohort_b.columns]
    keep = ["patient_id", *(f"{p}_{o}" for o in outcomes for p in ("onset", "incident"))]
    both = cohort_a.select(keep).join(cohort_b.select(keep), on="patient_id", suffix="_b")
    return RunDiff(
        attrition=_attrition(_read(run_a, "attrition.csv"), _read(run_b, "attrition.csv")),
        cohort=_membership(
            cohort_a,
            cohort_b,
            _read(run_a, "population.parquet"),
            _read(run_b, "population.parquet"),
        ),
        outcomes={o: _outcome_changes(both, o) for o in outcomes},
    )


def render_diff(diff: RunDiff) -> str:
    """The differences as plain text."""
    lines = ["attrition (remaining after each step):"]
    for row in diff.attrition:
        lines.append(f"  {row['step']:<24} {row['a']!s:>9} -> {row['b']!s:>9}  ({row['change']:+})")
    lines.append("cohort:")
    lines += [f"  {c.what}: {c.count} ({', '.join(c.sample)})" for c in diff.cohort] or ["  same"]
    for outcome, changes in diff.outcomes.items():
        lines.append(f"outcome {outcome} (patients in both cohorts):")
        shown = [c for c in changes if c.count]
        lines += [f"  {c.what}: {c.count} ({', '.join(c.sample)})" for c in shown] or ["  same"]
    return "\n".join(lines)
