"""A sweep's numbers per variant and outcome, and their suppression as one linked system.

Per variant and outcome: patients prevalent at index, at risk, incident within the horizon,
the Aalen-Johansen cumulative incidence at the horizon (death competing) with its interval,
and the rate per 1,000 person-years with its exact interval. Against the base: incident cases
gained and lost, the Jaccard overlap of the two sets of incident cases, and the median shift
of the onset date among patients with an onset in both.

Every count is a cell named by the set of patients it counts (a digest of their ids), so the
same patients counted in two variants are one cell, shown or hidden everywhere at once. The
sets tie cells together: a cohort is its prevalent, at-risk and other patients; the incident
cases of a variant are those shared with the base plus those gained, and the base's are those
shared plus those lost (the shared ones a latent count). That is what makes gained and lost,
differences between overlapping cohorts, safe to release.
"""

from __future__ import annotations

import hashlib
import itertools
import math
from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np
import polars as pl
import pyarrow as pa

from pipeline.compile import names
from pipeline.config._sweep import BASE
from pipeline.stats import cumulative_incidence_at_horizon, incidence_rate, protect_cells

COLUMNS = (
    "variant",
    "is_base",
    "outcome",
    "cohort",
    "prevalent",
    "at_risk",
    "incident",
    "cumulative_incidence",
    "ci_low",
    "ci_high",
    "rate_per_1000py",
    "rate_low",
    "rate_high",
    "gained",
    "lost",
    "jaccard",
    "median_onset_shift_days",
)
COUNTS = ("cohort", "prevalent", "at_risk", "incident", "gained", "lost")
"""The released counts; each is suppressed."""

_COMPARED = ("cohort", "prevalent", "at_risk", "incident")
"""Counts whose sets are compared between every two variants (their differences protected)."""

_OF_INCIDENT = ("cumulative_incidence", "ci_low", "ci_high", "rate_per_1000py")
_OF_INCIDENT += ("rate_low", "rate_high")


class Ids:
    """A set of patients as a sorted array of their ranks among every id of the sweep.

    Integers keep set operations fast at scale (numpy compares text ids pairwise), and the
    ranks are the same for the same inputs, so the cell keys, digests of them, are too.
    """

    def __init__(self, values: np.ndarray) -> None:
        self.values = np.unique(values).astype(np.int64)

    def __len__(self) -> int:
        return int(self.values.size)

    def __and__(self, other: Ids) -> Ids:
        return Ids(np.intersect1d(self.values, other.values, assume_unique=True))

    def __or__(self, other: Ids) -> Ids:
        return Ids(np.union1d(self.values, other.values))

    def __sub__(self, other: Ids) -> Ids:
        return Ids(np.setdiff1d(self.values, other.values, assume_unique=True))

    def key(self) -> str:
        """The cell key of the count of these patients: a digest of their sorted ranks."""
        return hashlib.sha256(self.values.tobytes()).hexdigest()[:20]


def _ids(frame: pl.DataFrame, universe: np.ndarray, condition: pl.Expr | None = None) -> Ids:
    chosen = frame if condition is None else frame.filter(condition)
    return Ids(np.searchsorted(universe, chosen["patient_id"].to_numpy()))


def _key(ids: Ids) -> str:
    return ids.key()


def _onset_shift(base: pl.DataFrame, other: pl.DataFrame, outcome: str) -> tuple[float, int]:
    """Median days from the base's onset to the variant's, among patients with both; and n."""
    column = names.outcome_columns(outcome).onset
    pairs = base.select("patient_id", pl.col(column).alias("b")).join(
        other.select("patient_id", pl.col(column).alias("v")), on="patient_id"
    )
    shifts = pairs.drop_nulls().select((pl.col("v") - pl.col("b")).dt.total_days().alias("d"))
    if not shifts.height:
        return math.nan, 0
    return float(shifts["d"].median()), shifts.height  # type: ignore[arg-type]


def sweep_rows(cohorts: Mapping[str, pa.Table], outcomes: Iterable[str]) -> list[dict[str, Any]]:
    """The exact numbers of every variant (the base first) and outcome: patient-level.

    Each row also holds, under ``sets``, the patient sets its counts describe (for the
    suppression) and ``shift_patients``, how many patients the median onset shift rests on.
    """
    frames = {key: pl.from_arrow(table) for key, table in cohorts.items()}
    base = frames[BASE]
    every = [f["patient_id"].to_numpy() for f in frames.values()]  # type: ignore[union-attr]
    universe = np.unique(np.concatenate(every))
    rows = []
    for outcome in outcomes:
        incident = pl.col(names.outcome_columns(outcome).incident).fill_null(value=False)
        base_cases = _ids(base, universe, incident)
        for key, frame in frames.items():
            assert isinstance(frame, pl.DataFrame)
            cohort = _ids(frame, universe)
            prevalent = _ids(
                frame,
                universe,
                pl.col(names.outcome_columns(outcome).prevalent).fill_null(value=False),
            )
            at_risk = _ids(
                frame,
                universe,
                pl.col(names.outcome_columns(outcome).at_risk).fill_null(value=False),
            )
            cases = _ids(frame, universe, incident)
            cif = cumulative_incidence_at_horizon(frame, outcome)
            rate = incidence_rate(frame, outcome)
            union = cases | base_cases
            shift, shifted = _onset_shift(base, frame, outcome)  # type: ignore[arg-type]
            sets = {
                "cohort": cohort,
                "prevalent": prevalent,
                "at_risk": at_risk,
                "incident": cases,
                "gained": cases - base_cases,
                "lost": base_cases - cases,
                "both": cases & base_cases,
                "other": cohort - prevalent - at_risk,
                "at_risk_not_incident": at_risk - cases,
            }
            rows.append(
                {
                    "variant": key,
                    "is_base": "yes" if key == BASE else "no",
                    "outcome": outcome,
                    **{name: len(sets[name]) for name in COUNTS},
                    "cumulative_incidence": cif.estimate,
                    "ci_low": cif.low,
                    "ci_high": cif.high,
                    "rate_per_1000py": rate.rate,
                    "rate_low": rate.low,
                    "rate_high": rate.high,
                    "person_years": rate.person_years,
                    "jaccard": len(cases & base_cases) / len(union) if union else math.nan,
                    "median_onset_shift_days": shift,
                    "shift_patients": shifted,
                    "sets": sets,
                }
            )
    return rows


def _relation(*terms: tuple[str, int]) -> tuple[tuple[str, int], ...]:
    """A relation with the coefficients of a key named twice added up (zeros dropped)."""
    summed: dict[str, int] = {}
    for key, coefficient in terms:
        summed[key] = summed.get(key, 0) + coefficient
    return tuple(sorted((k, c) for k, c in summed.items() if c))


def cell_system(
    rows: list[dict[str, Any]], threshold: int
) -> tuple[dict[str, int], list[tuple[tuple[str, int], ...]], set[str], dict[str, int]]:
    """The released counts of every row as cells: values, relations, latent cells, priority.

    The patients in one variant's set and not in another's are never printed, but two printed
    counts of overlapping sets bound them: like the report's unprinted counts, such a count is
    protected when it is small (1 to ``threshold`` - 1) and latent otherwise.
    """
    values: dict[str, int] = {}
    relations = []
    released: set[str] = set()
    priority: dict[str, int] = {}
    base_rows = {r["outcome"]: r for r in rows if r["variant"] == BASE}
    for outcome in dict.fromkeys(r["outcome"] for r in rows):
        group = [r for r in rows if r["outcome"] == outcome]
        for first, second in itertools.combinations(group, 2):
            for kind in _COMPARED:
                a, b = first["sets"][kind], second["sets"][kind]
                parts = {"common": a & b, "a_only": a - b, "b_only": b - a}
                for ids in parts.values():
                    values[ids.key()] = len(ids)
                # Counts of overlapping sets in two variants imply the counts of their
                # differences: those are released (though not printed), so protected when small.
                released.update(
                    parts[p].key() for p in ("a_only", "b_only") if 1 <= len(parts[p]) < threshold
                )
                relations += [
                    _relation(
                        (a.key(), 1), (parts["common"].key(), -1), (parts["a_only"].key(), -1)
                    ),
                    _relation(
                        (b.key(), 1), (parts["common"].key(), -1), (parts["b_only"].key(), -1)
                    ),
                ]
    for row in rows:
        keys = {name: _key(ids) for name, ids in row["sets"].items()}
        for name, ids in row["sets"].items():
            values[keys[name]] = len(ids)
        released.update(keys[n] for n in COUNTS)
        priority[keys["cohort"]] = max(priority.get(keys["cohort"], 0), 2)
        # The base's numbers are what every variant is read against: hidden last.
        needed = COUNTS if row["variant"] == BASE else ("incident",)
        for name in needed:
            priority[keys[name]] = max(priority.get(keys[name], 0), 1)
        base_incident = _key(base_rows[row["outcome"]]["sets"]["incident"])
        relations += [
            _relation(
                (keys["cohort"], 1),
                (keys["prevalent"], -1),
                (keys["at_risk"], -1),
                (keys["other"], -1),
            ),
            _relation(
                (keys["at_risk"], 1), (keys["incident"], -1), (keys["at_risk_not_incident"], -1)
            ),
            _relation((keys["incident"], 1), (keys["both"], -1), (keys["gained"], -1)),
            _relation((base_incident, 1), (keys["both"], -1), (keys["lost"], -1)),
        ]
    relations = sorted({r for r in relations if r})
    latent = set(values) - released
    return values, relations, latent, priority


def released_rows(
    rows: list[dict[str, Any]], threshold: int, hidden: frozenset[str] | None = None
) -> list[dict[str, Any]]:
    """The rows as released: small counts and their complements hidden, and what they imply.

    A count below ``threshold`` shows as ``<N``, a larger one hidden as a complement as ``*``.
    The cumulative incidence and the rate (with intervals) are left out when the incident or
    at-risk count is hidden; the Jaccard overlap when any count it is made of is; the median
    onset shift when fewer than ``threshold`` patients have an onset in both.

    ``hidden`` is the cells chosen in a larger system holding these rows' cells (the kept
    variants' reports, :mod:`pipeline.workflows._sweep_release`); by default the rows are
    suppressed as a system of their own.
    """
    if hidden is None:
        values, relations, latent, priority = cell_system(rows, threshold)
        hidden = protect_cells(values, relations, threshold, latent=latent, priority=priority)
    out = []
    for row in rows:
        keys = {name: _key(row["sets"][name]) for name in COUNTS}
        shown: dict[str, Any] = {c: row[c] for c in COLUMNS}
        for name in COUNTS:
            if keys[name] in hidden:
                value = row[name]
                shown[name] = f"<{threshold}" if 1 <= value < threshold else "*"
        base = row["variant"] == BASE
        gone = {n for n in COUNTS if keys[n] in hidden}
        if gone & {"incident", "at_risk"}:
            shown.update(dict.fromkeys(_OF_INCIDENT))
        base_row = next(r for r in rows if r["variant"] == BASE and r["outcome"] == row["outcome"])
        base_hidden = _key(base_row["sets"]["incident"]) in hidden
        if gone & {"incident", "gained", "lost"} or base_hidden:
            shown["jaccard"] = None
        if row["shift_patients"] < threshold:
            shown["median_onset_shift_days"] = None
        if base:
            shown["gained"] = shown["lost"] = shown["jaccard"] = None
            shown["median_onset_shift_days"] = None
        out.append(
            {k: (None if isinstance(v, float) and math.isnan(v) else v) for k, v in shown.items()}
        )
    return out
