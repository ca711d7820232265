"""Summary tables of the study report, and the small-cell suppression shared by all of them.

Why a fixpoint over several tables: the same count often appears in more than one table (the
cohort size in the flow and in Table 1, the events of an outcome in the incidence table and as
a Table 1 column). Hiding a count in one table is useless if another table shows it, or lets it
be worked out. So every displayed count has a *key* naming the quantity it is; each table is
suppressed by :func:`pipeline.stats.suppress_counts` on its own relations, with the counts
already hidden elsewhere forced hidden (passed as 1, which makes them primary), and this repeats
until no table hides anything new. At the fixpoint every table's relations are protected with
the same hidden set. The cohort size and the source population are passed with a large offset
so they are chosen as a complement only when nothing else is left: they are the numbers a
reader needs most.

A hidden count below the threshold is published as ``<threshold``; a larger count hidden only
to protect a small one is published as ``*``, so no published marker misstates a count.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import polars as pl

from pipeline.stats import (
    DAYS_PER_YEAR,
    OUTCOME,
    aalen_johansen,
    baseline_variables,
    coarsen_curve,
    competing_risk_data,
    cumulative_incidence,
    incidence_rate,
    kaplan_meier,
    outcome_combinations,
    pairwise_dependence,
    suppress_counts,
    table_one,
)

_PROTECTED = frozenset({"N", "src"})
_OFFSET = 10**12
_NUMERIC_STATS = ("mean", "sd", "median", "q1", "q3")
_DERIVED_DEPENDENCE = ("odds_ratio", "or_low", "or_high", "phi", "tau_b", "frank_theta")


@dataclass(frozen=True)
class Block:
    """One table as suppression sees it: counts, their keys and the table's relations.

    Attributes:
        frame: Integer count columns, plus ``<column>#key`` string columns naming each cell.
        counts: Count columns (the parts).
        total: Column holding each row's total, if rows add up.
        group_by: Columns splitting rows into blocks whose columns add up.
        column_totals: Whether columns (per block) add up to a known total.
    """

    frame: pl.DataFrame
    counts: tuple[str, ...]
    total: str | None = None
    group_by: tuple[str, ...] = ()
    column_totals: bool = False

    @property
    def cells(self) -> tuple[str, ...]:
        """Every count column, the total included."""
        return (*self.counts, *([self.total] if self.total else []))


def _block_hidden(block: Block, hidden: frozenset[str], threshold: int) -> set[str]:
    forced = block.frame.with_columns(
        pl.when(pl.col(f"{c}#key").is_in(list(hidden)))
        .then(1)
        .when(pl.col(f"{c}#key").is_in(list(_PROTECTED)) & (pl.col(c) >= threshold))
        .then(pl.col(c) + _OFFSET)
        .otherwise(pl.col(c))
        .cast(pl.Int64)
        .alias(c)
        for c in block.cells
    )
    out = suppress_counts(
        forced,
        list(block.counts),
        threshold=threshold,
        total_column=block.total,
        group_by=list(block.group_by),
        column_totals=block.column_totals,
    )
    found: set[str] = set()
    for c in block.cells:
        text = out[c].cast(pl.String).to_list()
        keys = block.frame[f"{c}#key"].to_list()
        original = forced[c].to_list()
        found.update(k for k, t, v in zip(keys, text, original, strict=True) if t != str(v))
    return found


def hidden_keys(blocks: Sequence[Block], threshold: int) -> frozenset[str]:
    """Keys of every count to hide, consistent across all tables (see the module docstring).

    Args:
        blocks: Every table of the report.
        threshold: Smallest count that may be shown.

    Returns:
        The hidden keys.
    """
    hidden: frozenset[str] = frozenset()
    while True:
        found = set(hidden)
        for block in blocks:
            found |= _block_hidden(block, hidden, threshold)
        if found == hidden:
            return hidden
        hidden = frozenset(found)


def _keyed(rows: list[dict[str, Any]], schema: dict[str, Any]) -> pl.DataFrame:
    return pl.DataFrame(rows, schema=schema, orient="row")


# --- tables: raw counts with keys ------------------------------------------------------------


def flow_block(attrition: pl.DataFrame, cohort_size: int) -> Block:
    """The attrition log; each step's remaining count is the next step's patients_before."""
    last = attrition.height - 1
    rows = []
    for i, r in enumerate(attrition.iter_rows(named=True)):
        rem_key = "N" if i == last and r["remaining"] == cohort_size else f"flow|{i}"
        rows.append(
            r
            | {
                "patients_before#key": "src" if i == 0 else f"flow|{i - 1}",
                "removed#key": f"removed|{i}",
                "remaining#key": rem_key,
            }
        )
    schema = dict(attrition.schema) | {
        f"{c}#key": pl.String for c in ("patients_before", "removed", "remaining")
    }
    return Block(_keyed(rows, schema), ("removed", "remaining"), total="patients_before")


def _group_names(by: str) -> tuple[str, ...]:
    return ("overall", f"{by}=false", f"{by}=true", f"{by}=null")


def _t1_key(outcome: str, variable: str, row: str, group: str) -> str:
    if variable == "patients":
        special = ("N", f"nonevents|{outcome}", f"events|{outcome}", f"prevalent|{outcome}")
        return dict(zip(_group_names(f"incident_{outcome}"), special, strict=True))[group]
    if group == "overall":
        if variable.startswith("prevalent_") and row in ("true", "false"):
            kind = "prevalent" if row == "true" else "atrisk"
            return f"{kind}|{variable.removeprefix('prevalent_')}"
        return f"t1|{variable}|{row}"
    return f"t1|{outcome}|{variable}|{row}|{group}"


def table_one_blocks(cohort: pl.DataFrame, outcome: str) -> tuple[pl.DataFrame, Block, Block]:
    """Table 1 by incident status of one outcome, and its two suppression blocks.

    The first block has, per variable, a row per level (``non-missing`` for numeric ones) and a
    ``missing`` row, so each variable's rows add up to the group size. The second holds the
    group sizes (``patients``), which add up to the cohort size; it is a block of its own
    because with column totals a one-row block's cells would count as known totals.

    Returns:
        The long Table 1 from :func:`pipeline.stats.table_one`, the variables block and the
        group-size block.
    """
    by = f"incident_{outcome}"
    variables = baseline_variables(cohort, exclude=[by, f"prevalent_{outcome}"])
    long = table_one(cohort, by=by, variables=variables)
    groups = _group_names(by)
    sizes = cohort.group_by(pl.col(by).cast(pl.String).fill_null("null")).len()
    size = {f"{by}={k}": int(n) for k, n in sizes.iter_rows()} | {"overall": cohort.height}
    cells: dict[tuple[str, str], dict[str, int]] = {}
    for r in long.iter_rows(named=True):
        row = r["level"] if r["level"] is not None else "non-missing"
        cells.setdefault((r["variable"], row), {})[r["group"]] = r["n"]
        cells.setdefault((r["variable"], "missing"), {})[r["group"]] = r["missing"]
    schema: dict[str, Any] = {"variable": pl.String, "row": pl.String}
    schema |= dict.fromkeys(groups, pl.Int64) | {f"{g}#key": pl.String for g in groups}

    def frame(items: Iterable[tuple[tuple[str, str], dict[str, int]]]) -> pl.DataFrame:
        rows = []
        for (variable, row), values in items:
            record: dict[str, Any] = {"variable": variable, "row": row}
            for g in groups:
                record[g] = values.get(g, 0)
                record[f"{g}#key"] = _t1_key(outcome, variable, row, g)
            rows.append(record)
        return _keyed(rows, schema)

    return (
        long,
        Block(frame(cells.items()), groups[1:], "overall", ("variable",), column_totals=True),
        Block(frame([(("patients", "all"), size)]), groups[1:], "overall"),
    )


def incidence_block(cohort: pl.DataFrame, outcomes: Sequence[str]) -> tuple[list[Any], Block]:
    """Cumulative incidence and rates per outcome; events and non-events add up to at-risk."""
    results, rows = [], []
    for o in outcomes:
        ci, rate = cumulative_incidence(cohort, o), incidence_rate(cohort, o)
        results.append((o, ci, rate))
        rows.append(
            {
                "outcome": o,
                "events": ci.events,
                "nonevents": ci.at_risk - ci.events,
                "at_risk": ci.at_risk,
                "events#key": f"events|{o}",
                "nonevents#key": f"nonevents|{o}",
                "at_risk#key": f"atrisk|{o}",
            }
        )
    schema = {
        "outcome": pl.String,
        "events": pl.Int64,
        "nonevents": pl.Int64,
        "at_risk": pl.Int64,
    } | {f"{c}#key": pl.String for c in ("events", "nonevents", "at_risk")}
    return results, Block(_keyed(rows, schema), ("events", "nonevents"), total="at_risk")


def combinations_block(cohort: pl.DataFrame, outcomes: Sequence[str]) -> Block:
    """Patients by exact combination of incident outcomes; the rows add up to those at risk."""
    table = outcome_combinations(cohort, outcomes, include_none=True)
    table = table.with_columns(("comb|" + pl.col("combination")).alias("n#key"))
    return Block(table, ("n",), column_totals=True)


def dependence_block(cohort: pl.DataFrame, outcomes: Sequence[str]) -> Block:
    """Pairwise 2x2 tables; the four cells of a pair add up to the pair's n."""
    table = pairwise_dependence(cohort, outcomes)
    pair = pl.col("outcome_1") + "|" + pl.col("outcome_2")
    table = table.with_columns(
        ("dep|" + pair + f"|{c}").alias(f"{c}#key") for c in ("a", "b", "c", "d", "n")
    )
    return Block(table, ("a", "b", "c", "d"), total="n")


def quality_blocks(quality: pl.DataFrame) -> list[Block]:
    """Rows used and set aside, one block per source table; they add up to the rows read.

    A table with a single line (all rows used) gets no column total: that line *is* the total
    and is shown.
    """
    key = "q|" + pl.col("source_table") + "|" + pl.col("outcome") + "|" + pl.col("reason")
    table = quality.with_columns(pl.col("n_rows").cast(pl.Int64), key.alias("n_rows#key"))
    return [
        Block(part, ("n_rows",), column_totals=part.height > 1)
        for part in table.partition_by("source_table", maintain_order=True)
    ]


# --- applying the hidden set ----------------------------------------------------------------


def hidden_marker(value: int, threshold: int) -> str:
    """How a hidden count reads: ``<threshold`` when it is small, else ``*``.

    A count hidden only so that a small one cannot be worked out by subtraction is larger than
    the threshold; showing it as ``<5`` would misstate it.
    """
    return f"<{threshold}" if 0 < value < threshold else "*"


def shown(value: int, key: str, hidden: frozenset[str], threshold: int) -> str:
    """A count as published: the number, or its hidden marker."""
    return hidden_marker(value, threshold) if key in hidden else str(value)


def masked(block: Block, hidden: frozenset[str], threshold: int) -> pl.DataFrame:
    """The block's frame with every count as published text and the key columns dropped."""
    return block.frame.with_columns(
        pl.Series(
            c,
            [
                shown(v, k, hidden, threshold)
                for v, k in zip(
                    block.frame[c].to_list(), block.frame[f"{c}#key"].to_list(), strict=True
                )
            ],
            dtype=pl.String,
        )
        for c in block.cells
    ).drop([f"{c}#key" for c in block.cells])


def differenced_means(longs: Iterable[pl.DataFrame], threshold: int) -> frozenset[str]:
    """Numeric variables whose means and SDs must not be shown in any group of any Table 1.

    A group's mean times its size is the sum of its values, and the groups of one Table 1
    (not incident, incident, not at risk) add up to the overall column, which every outcome's
    Table 1 shares. So when one group has between 1 and ``threshold - 1`` values, hiding only
    its own mean is useless: the overall sum minus the other groups' sums gives it, from this
    Table 1 or another. Sums of squares (SDs) add up the same way. Medians and quartiles do
    not add up and are kept for groups of at least ``threshold`` values.

    Args:
        longs: The long Table 1 of every outcome (:func:`pipeline.stats.table_one`).
        threshold: Smallest group whose values may be summarised.

    Returns:
        The variables whose mean and SD are left out everywhere.
    """
    small = pl.col("n").is_between(1, threshold - 1)
    return frozenset(
        v
        for long in longs
        for v in long.filter(pl.col("level").is_null() & small)["variable"].to_list()
    )


def table_one_summary(
    outcome: str,
    long: pl.DataFrame,
    blocks: Sequence[Block],
    hidden: frozenset[str],
    threshold: int,
    no_means: frozenset[str] = frozenset(),
) -> pl.DataFrame:
    """Table 1 as published: counts suppressed, and statistics of hidden counts removed.

    A percentage is shown only when every count of its variable in that group is shown,
    because a percentage of a shown count reveals its denominator. Means, SDs and quartiles are
    left out when fewer than ``threshold`` patients contribute: a summary of a few values
    can describe individuals, while a summary of many reveals nothing about the count even
    when that count is hidden as a complement. Means and SDs of the variables in ``no_means``
    (:func:`differenced_means`) are left out in every group. There is no minimum or maximum:
    each is a single patient's value.
    """
    status: dict[tuple[str, str, str], tuple[int, bool]] = {}
    for block in blocks:
        for r in block.frame.iter_rows(named=True):
            for g in block.cells:
                status[(r["variable"], r["row"], g)] = (r[g], r[f"{g}#key"] in hidden)
    out = []
    for r in [
        {"variable": "patients", "level": None, "group": g}
        for g in _group_names(f"incident_{outcome}")
    ] + list(long.iter_rows(named=True)):
        var, group = r["variable"], r["group"]
        row = "all" if var == "patients" else (r["level"] or "non-missing")
        n, n_hidden = status[(var, row, group)]
        record = {
            "by": f"incident_{outcome}",
            "variable": var,
            "level": r["level"],
            "group": group,
            "n": hidden_marker(n, threshold) if n_hidden else str(n),
        }
        block_hidden = any(h for (v, _, g), (_, h) in status.items() if v == var and g == group)
        record["percent"] = (
            None if block_hidden or r.get("percent") is None else round(r["percent"], 1)
        )
        for s in _NUMERIC_STATS:  # summaries of fewer than `threshold` values could identify
            gone = n < threshold or (s in ("mean", "sd") and var in no_means)
            value = None if gone else r.get(s)
            record[s] = None if value is None or math.isnan(value) else round(value, 2)
        m, m_hidden = status.get((var, "missing", group), (0, False))
        missing = hidden_marker(m, threshold) if m_hidden else str(m)
        record["missing"] = None if var == "patients" else missing
        out.append(record)
    schema = {
        "by": pl.String,
        "variable": pl.String,
        "level": pl.String,
        "group": pl.String,
        "n": pl.String,
        "percent": pl.Float64,
    } | dict.fromkeys(_NUMERIC_STATS, pl.Float64)
    return pl.DataFrame(out, schema=schema | {"missing": pl.String}, orient="row")


def incidence_summary(
    results: Iterable[Any], titles: dict[str, str], hidden: frozenset[str], threshold: int
) -> pl.DataFrame:
    """Incidence as published; estimates from a hidden count are left empty."""
    rows = []
    for o, ci, rate in results:
        gone = f"events|{o}" in hidden or f"atrisk|{o}" in hidden

        def keep(x: float, digits: int, *, gone: bool = gone) -> float | None:
            return None if gone or math.isnan(x) else round(x, digits)

        rows.append(
            {
                "outcome": o,
                "title": titles.get(o, o),
                "at_risk": shown(ci.at_risk, f"atrisk|{o}", hidden, threshold),
                "events": shown(ci.events, f"events|{o}", hidden, threshold),
                "cumulative_incidence_percent": keep(100 * ci.proportion, 2),
                "ci_low_percent": keep(100 * ci.low, 2),
                "ci_high_percent": keep(100 * ci.high, 2),
                "person_years": round(rate.person_years, 1),
                "rate_per_1000_py": keep(rate.rate, 2),
                "rate_low": keep(rate.low, 2),
                "rate_high": keep(rate.high, 2),
            }
        )
    return pl.DataFrame(rows)


def dependence_summary(block: Block, hidden: frozenset[str], threshold: int) -> pl.DataFrame:
    """Pairwise dependence as published; measures from a table with a hidden cell are empty."""
    out = masked(block, hidden, threshold)
    gone = pl.any_horizontal(pl.col(c).str.starts_with("<") for c in ("a", "b", "c", "d", "n"))
    return out.with_columns(
        pl.when(gone).then(None).otherwise(pl.col(c).round(3)).alias(c) for c in _DERIVED_DEPENDENCE
    ).rename({"a": "both", "b": "first_only", "c": "second_only", "d": "neither"})


CURVE_GRID_DAYS = 30
"""Released curves may step only every this many days (and at the last day of follow-up)."""


def curve_note(threshold: int) -> str:
    """The sentence under the curves that says how they were coarsened, and what that costs."""
    return (
        f"So that no curve shows a single patient, each step stands for at least {threshold} "
        f"events since the previous step, steps fall only every {CURVE_GRID_DAYS} days or on the "
        f"last day of follow-up when at least {threshold} patients reach it, and the curves stop "
        f"where fewer than {threshold} patients are at risk. At each step the curve shows the "
        "full estimate on that day; between steps it may lag the full estimate by fewer than "
        f"{threshold} events."
    )


def curve_data(cohort: pl.DataFrame, outcome: str, threshold: int) -> tuple[Any, Any, Any, Any]:
    """Aalen-Johansen (death competing) and 1 - Kaplan-Meier (deaths censored), in years.

    Both curves are coarsened by :func:`pipeline.stats.coarsen_curve` on a grid of
    :data:`CURVE_GRID_DAYS` days: each drawn step stands for at least ``threshold`` events and
    at least ``threshold`` patients at risk, and the curves stop where fewer are at risk. The
    two share their event counts and risk sets, so they step at the same times.
    """
    durations, codes = competing_risk_data(cohort, outcome)
    last = float(durations.max()) if durations.size else 0.0
    grid = np.arange(CURVE_GRID_DAYS, last + CURVE_GRID_DAYS, CURVE_GRID_DAYS, dtype=np.float64)
    aj = coarsen_curve(aalen_johansen(durations, codes, OUTCOME), threshold, start=0.0, grid=grid)
    km = kaplan_meier(durations, codes == OUTCOME)
    km_times, km_values = coarsen_curve(km, threshold, start=1.0, grid=grid).drawn()
    aj_times, aj_values = aj.drawn()
    return aj_times / DAYS_PER_YEAR, aj_values, km_times / DAYS_PER_YEAR, 1.0 - km_values
