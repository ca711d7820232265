"""``ascertain diff``: what changed between two builds, patient by patient, and why.

The usual question is "what did my definition change do": which patients entered or left the
cohort (and at which eligibility step), and, per outcome, whose rule is newly met or no longer
met, whose onset moved, and who became or stopped being incident; for patients in both
cohorts, whose follow-up end, end reason or covariate values changed. The two manifests say
what was changed to cause it: the study keys, definition files and extract files that differ.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import polars as pl

from pipeline.compile.names import (
    ONSET_PREFIX,
    PREVALENT_PREFIX,
    onset_column,
    outcome_columns,
)
from pipeline.errors import AscertainError
from pipeline.outputs import read_manifest

SAMPLE = 5

PATIENT_LEVEL = (
    f"patient-level detail (exact counts, up to {SAMPLE} patient ids each): keep it inside the "
    "secure environment"
)
"""The first line of the printed diff: its counts are unsuppressed and its examples name
patients, so whoever pastes it somewhere is told what it is."""

FOLLOWUP_COLUMNS = ("followup_end", "end_reason")
"""Follow-up columns compared patient by patient (``followup_days`` follows from the end)."""

FILE_GROUPS = (
    ("study", "study file"),
    ("definitions", "definition file"),
    ("reference_rates", "reference rate table"),
    ("extract", "extract file"),
)


@dataclass
class Change:
    """One kind of change with how many patients it concerns and a few of their ids."""

    what: str
    count: int
    sample: list[str]


@dataclass
class InputChange:
    """One input that differs between the two builds' manifests.

    ``what`` is ``study key`` (``name`` a flat key path such as ``outcomes.horizon_days``,
    ``a`` and ``b`` its values) or ``study file``, ``definition file``, ``reference rate
    table``, ``extract file``
    (``name`` its recorded path, ``a`` and ``b`` its SHA-256). ``None`` means absent: the key
    is not set, or the file was not an input of that build.
    """

    what: str
    name: str
    a: object
    b: object

    @property
    def state(self) -> str:
        """``added`` (only in the second build), ``removed`` (only in the first) or ``changed``."""
        return "added" if self.a is None else "removed" if self.b is None else "changed"


@dataclass
class RunDiff:
    """The differences between two output folders.

    ``values`` holds, for patients in both cohorts, one change per compared column (follow-up
    end, end reason, then each covariate column) and, for ``end_reason``, one per pair of
    reasons (``end_reason horizon -> death``). ``columns_only`` names covariate columns only
    one cohort has (``a`` or ``b``). ``notes`` say what could not be compared.
    """

    attrition: list[dict[str, object]] = field(default_factory=list)
    cohort: list[Change] = field(default_factory=list)
    outcomes: dict[str, list[Change]] = field(default_factory=dict)
    values: list[Change] = field(default_factory=list)
    columns_only: dict[str, list[str]] = field(default_factory=dict)
    inputs: list[InputChange] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def identical(self) -> bool:
        """Whether nothing changed: neither the inputs nor any patient's row."""
        changed = [c for c in [*self.cohort, *self.values] if c.count] + [
            c for changes in self.outcomes.values() for c in changes if c.count
        ]
        same_columns = not any(self.columns_only.values())
        same_attrition = all(row["change"] == 0 for row in self.attrition)
        return not changed and not self.inputs and same_columns and same_attrition


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
    columns = outcome_columns(name)
    onset_a, onset_b = pl.col(columns.onset), pl.col(f"{columns.onset}_b")
    incident_a, incident_b = pl.col(columns.incident), pl.col(f"{columns.incident}_b")
    rules = {
        "rule newly met": onset_a.is_null() & onset_b.is_not_null(),
        "rule no longer met": onset_a.is_not_null() & onset_b.is_null(),
        "onset moved": onset_a.is_not_null() & onset_b.is_not_null() & (onset_a != onset_b),
        "became incident": _false(incident_a) & _true(incident_b),
        "no longer incident": _true(incident_a) & _false(incident_b),
    }
    return [_change(what, both.filter(rule)["patient_id"]) for what, rule in rules.items()]


def covariate_columns(cohort: pl.DataFrame) -> list[str]:
    """The covariate columns of a cohort: those between ``sex`` and the first outcome column.

    The analysis table's order is fixed (see the README's outputs table): patient_id,
    index_date, age_at_index, sex, the covariates, then each outcome's columns from
    ``prevalent_X``, then follow-up.
    """
    columns = cohort.columns
    start = columns.index("sex") + 1 if "sex" in columns else 0
    end = next(
        (i for i, c in enumerate(columns) if c.startswith(PREVALENT_PREFIX) or c == "followup_end"),
        len(columns),
    )
    return columns[start:end]


def _value_changes(
    cohort_a: pl.DataFrame, cohort_b: pl.DataFrame
) -> tuple[list[Change], dict[str, list[str]]]:
    covariates_a, covariates_b = covariate_columns(cohort_a), covariate_columns(cohort_b)
    shared = [c for c in covariates_a if c in covariates_b]
    columns = [c for c in FOLLOWUP_COLUMNS if c in cohort_a.columns and c in cohort_b.columns]
    columns += shared
    both = cohort_a.select("patient_id", *columns).join(
        cohort_b.select("patient_id", *columns), on="patient_id", suffix="_b"
    )
    changes = []
    for column in columns:
        differs = both.filter(pl.col(column).ne_missing(pl.col(f"{column}_b")))
        changes.append(_change(f"{column} changed", differs["patient_id"]))
        if column == "end_reason":
            pairs = differs.group_by("end_reason", "end_reason_b")
            for (a, b), group in sorted(pairs, key=lambda g: (str(g[0][0]), str(g[0][1]))):
                changes.append(_change(f"end_reason {a} -> {b}", group["patient_id"]))
    only = {
        "a": [c for c in covariates_a if c not in covariates_b],
        "b": [c for c in covariates_b if c not in covariates_a],
    }
    return changes, only


def _file_changes(manifest_a: dict[str, Any], manifest_b: dict[str, Any]) -> list[InputChange]:
    changes = []
    for group, what in FILE_GROUPS:
        entries_a, entries_b = manifest_a.get(group) or [], manifest_b.get(group) or []
        a = {str(e["path"]): e["sha256"] for e in entries_a}
        b = {str(e["path"]): e["sha256"] for e in entries_b}
        if group == "study":  # one study file, matched by its role, not its name
            if list(a.values()) != list(b.values()):
                names = " -> ".join(dict.fromkeys([*a, *b]))
                changes.append(
                    InputChange(
                        what, names, next(iter(a.values()), None), next(iter(b.values()), None)
                    )
                )
            continue
        changes += [
            InputChange(what, name, a.get(name), b.get(name))
            for name in sorted(a.keys() | b.keys())
            if a.get(name) != b.get(name)
        ]
    return changes


def _input_changes(run_a: Path, run_b: Path) -> tuple[list[InputChange], list[str]]:
    """Inputs that differ between the two manifests, and notes on what could not be compared."""
    manifest_a, manifest_b = read_manifest(run_a), read_manifest(run_b)
    keys_a, keys_b = manifest_a.get("study_keys"), manifest_b.get("study_keys")
    notes = []
    changes: list[InputChange] = []
    if keys_a is None or keys_b is None:
        older = " and ".join(str(r) for r, k in ((run_a, keys_a), (run_b, keys_b)) if k is None)
        notes.append(
            f"study keys not compared: the manifest of {older} does not record them (built by "
            "an earlier version of ascertain); the study files are compared by hash only"
        )
    else:
        changes += [
            InputChange("study key", key, keys_a.get(key), keys_b.get(key))
            for key in sorted(keys_a.keys() | keys_b.keys())
            if keys_a.get(key) != keys_b.get(key)
        ]
    return changes + _file_changes(manifest_a, manifest_b), notes


def diff_runs(run_a: Path, run_b: Path) -> RunDiff:
    """Compare two output folders of the same kind of study.

    Raises:
        AscertainError: A folder lacks the files ``ascertain build`` writes.
    """
    cohort_a, cohort_b = _read(run_a, "cohort.parquet"), _read(run_b, "cohort.parquet")
    prefix = ONSET_PREFIX
    outcomes = [c.removeprefix(prefix) for c in cohort_a.columns if c.startswith(prefix)]
    outcomes = [o for o in outcomes if onset_column(o) in cohort_b.columns]
    keep = ["patient_id", *(f"{p}_{o}" for o in outcomes for p in ("onset", "incident"))]
    both = cohort_a.select(keep).join(cohort_b.select(keep), on="patient_id", suffix="_b")
    values, columns_only = _value_changes(cohort_a, cohort_b)
    inputs, notes = _input_changes(run_a, run_b)
    return RunDiff(
        attrition=_attrition(_read(run_a, "attrition.csv"), _read(run_b, "attrition.csv")),
        cohort=_membership(
            cohort_a,
            cohort_b,
            _read(run_a, "population.parquet"),
            _read(run_b, "population.parquet"),
        ),
        outcomes={o: _outcome_changes(both, o) for o in outcomes},
        values=values,
        columns_only=columns_only,
        inputs=inputs,
        notes=notes,
    )


def _value(value: object) -> str:
    return "(not set)" if value is None else json.dumps(value, ensure_ascii=False)


def _input_line(change: InputChange) -> str:
    if change.what == "study key":
        return f"  study key {change.name}: {_value(change.a)} -> {_value(change.b)}"
    return f"  {change.what} {change.name}: {change.state}"


def render_diff(diff: RunDiff) -> str:
    """The differences as plain text, headed by the warning that they are patient-level."""
    lines = [PATIENT_LEVEL, "inputs (from the two manifests):"]
    lines += [_input_line(c) for c in diff.inputs] or ["  same"]
    lines += [f"  note: {n}" for n in diff.notes]
    lines.append("attrition (remaining after each step):")
    for row in diff.attrition:
        lines.append(f"  {row['step']:<24} {row['a']!s:>9} -> {row['b']!s:>9}  ({row['change']:+})")
    lines.append("cohort:")
    lines += [f"  {c.what}: {c.count} ({', '.join(c.sample)})" for c in diff.cohort] or ["  same"]
    for outcome, changes in diff.outcomes.items():
        lines.append(f"outcome {outcome} (patients in both cohorts):")
        shown = [c for c in changes if c.count]
        lines += [f"  {c.what}: {c.count} ({', '.join(c.sample)})" for c in shown] or ["  same"]
    lines.append("follow-up and covariates (patients in both cohorts):")
    shown = [c for c in diff.values if c.count]
    lines += [f"  {c.what}: {c.count} ({', '.join(c.sample)})" for c in shown] or ["  same"]
    for side, run in (("a", "first"), ("b", "second")):
        if diff.columns_only.get(side):
            lines.append(f"  only in the {run} cohort: {', '.join(diff.columns_only[side])}")
    return "\n".join(lines)
