"""Summary tables of the study report, and the small-cell suppression shared by all of them.

Every released count of the report (the flow, Table 1 of each outcome, incidence,
combinations, dependence and the quality log) is one cell of a single system, suppressed
together by :func:`pipeline.stats.protect_cells`:

- Each count has a *key* naming the set it counts; a set shown in two tables (the cohort size
  in the flow and Table 1, the events of an outcome in the incidence table and as a Table 1
  column) has one key, so it is hidden everywhere or nowhere.
- Relations within tables: parts add up to their row total (flow, incidence, dependence, the
  Table 1 groups); each Table 1 variable's rows add up to its group's size (a count of the
  patients row); quality lines add up to the rows read of their source table (a count that is
  not printed but taken as known).
- Relations across tables: every count of patients of the cohort is described by whom it counts
  (:mod:`._report_cells`) and tied to latent atoms of the cohort, which implies every identity
  between the tables (events of X = both + first only in the dependence table + Table 1's
  "incident X, prevalent Y" cell, combinations against incidence, and so on). Counts with the
  same atoms share a key.
- Complements are chosen from the detailed tables first (Table 1 by outcome, combinations,
  dependence, quality), then Table 1's overall column and the flow, then events and group
  sizes, and the cohort size and source population last: those are the numbers readers need.

Numbers derived from counts (percentages, estimates, intervals, odds ratios) are left empty
wherever a count they are computed from is hidden.

A hidden count below the threshold is published as ``<threshold``; a larger count hidden only
to protect a small one is published as ``*``, so no published marker misstates a count.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import polars as pl

from pipeline.outputs._report_cells import Spec, aliases, atom_relations, cohort_atoms
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
    protect_cells,
    table_one,
)
from pipeline.stats._disclosure import Relation

_PRIORITY = (  # how much readers need a count; complements come from low ranks first
    (3, ("N", "src")),
    (2, ("events|", "nonevents|", "atrisk|", "t1size|")),
    (1, ("t1|", "flow|", "removed|")),
)


def _priority(key: str) -> int:
    return next((rank for rank, starts in _PRIORITY if key.startswith(starts)), 0)


_NUMERIC_STATS = ("mean", "sd", "median", "q1", "q3")
_DERIVED_DEPENDENCE = ("odds_ratio", "or_low", "or_high", "phi", "tau_b", "frank_theta")
_STATES = {"false": "false", "true": "true", "null": "null"}


@dataclass(frozen=True)
class Block:
    """One table as suppression sees it: counts, their keys, meanings and relations.

    Attributes:
        frame: Integer count columns, plus ``<column>#key`` string columns naming each cell.
        counts: Count columns (the parts).
        total: Column holding each row's total, if rows add up.
        relations: Further identities between keys (beyond rows adding up to ``total``).
        meanings: For counts of cohort patients, which patients (see :mod:`._report_cells`).
        extra: Counts that are not printed but taken as known (e.g. rows read), by key.
    """

    frame: pl.DataFrame
    counts: tuple[str, ...]
    total: str | None = None
    relations: tuple[Relation, ...] = ()
    meanings: Mapping[str, Spec] = field(default_factory=dict)
    extra: Mapping[str, int] = field(default_factory=dict)

    @property
    def cells(self) -> tuple[str, ...]:
        """Every count column, the total included."""
        return (*self.counts, *([self.total] if self.total else []))

    def values(self) -> dict[str, int]:
        """Each key's count (a key repeated in the block has one count)."""
        out = dict(self.extra)
        for c in self.cells:
            out.update(zip(self.frame[f"{c}#key"].to_list(), self.frame[c].to_list(), strict=True))
        return out

    def all_relations(self) -> list[Relation]:
        """The block's relations, with each row's parts adding up to its total."""
        out = list(self.relations)
        if self.total:
            keys = self.frame.select(f"{c}#key" for c in self.cells).rows()
            out.extend(((*((k, 1) for k in row[:-1]), (row[-1], -1))) for row in keys)
        return out


def hidden_keys(
    blocks: Sequence[Block], threshold: int, cohort: pl.DataFrame, outcomes: Sequence[str]
) -> frozenset[str]:
    """Keys of every count to hide, chosen over all tables at once (see the module docstring).

    Args:
        blocks: Every table of the report.
        threshold: Smallest count that may be shown.
        cohort: The analysis table the counts were taken from (for the atoms).
        outcomes: The study's outcomes.

    Returns:
        The hidden keys.
    """
    values: dict[str, int] = {}
    meanings: dict[str, Spec] = {}
    relations: list[Relation] = []
    for block in blocks:
        values |= block.values()
        meanings |= block.meanings
        relations += block.all_relations()
    prevalent = {f"prevalent_{o}" for o in outcomes}
    variables = [v for v in baseline_variables(cohort) if v not in prevalent]
    atoms = cohort_atoms(cohort, outcomes, variables)
    relations += atom_relations(atoms, meanings)
    alias = aliases(atoms, meanings)
    latent = atoms.values()
    merged: dict[str, int] = {}
    for key, value in {**values, **latent}.items():
        merged[alias.get(key, key)] = value
    priority: dict[str, int] = {}
    for key in values:  # a key shared by tables gets the priority of its most needed use
        rank = _priority(key)
        priority[alias.get(key, key)] = max(rank, priority.get(alias.get(key, key), 0))
    unique: set[Relation] = set()
    for relation in relations:
        summed: dict[str, int] = {}
        for k, c in relation:
            summed[alias.get(k, k)] = summed.get(alias.get(k, k), 0) + c
        if len(kept := tuple(sorted((k, c) for k, c in summed.items() if c))) > 1:
            unique.add(kept)
    hidden = protect_cells(
        merged,
        sorted(unique),
        threshold,
        latent=latent,
        priority=priority,
    )
    return frozenset(k for k in values if alias.get(k, k) in hidden)


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
    frame = _keyed(rows, schema)
    meanings: dict[str, Spec] = {"N": ()} if "N" in frame["remaining#key"] else {}
    return Block(frame, ("removed", "remaining"), total="patients_before", meanings=meanings)


def _group_names(by: str) -> tuple[str, ...]:
    return ("overall", f"{by}=false", f"{by}=true", f"{by}=null")


def _t1_key(outcome: str, variable: str, row: str, group: str) -> str:
    if variable == "patients":
        special = ("N", *(f"t1size|{outcome}|{state}" for state in ("false", "true", "null")))
        return dict(zip(_group_names(f"incident_{outcome}"), special, strict=True))[group]
    if group == "overall":
        return f"t1|{variable}|{row}"
    return f"t1|{outcome}|{variable}|{row}|{group}"


def _t1_meaning(outcome: str, variable: str, row: str, group: str) -> Spec:
    """Whom a Table 1 count counts: its group's incident state, and its variable's level."""
    spec: list[tuple[str, str]] = []
    if group != "overall":
        spec.append((f"inc|{outcome}", group.rsplit("=", 1)[1]))
    if variable.startswith("prevalent_"):
        spec.append((f"prev|{variable.removeprefix('prevalent_')}", _STATES.get(row, "null")))
    elif variable != "patients":
        spec.append((variable, row))
    return tuple(spec)


def table_one_blocks(cohort: pl.DataFrame, outcome: str) -> tuple[pl.DataFrame, Block, Block]:
    """Table 1 by incident status of one outcome, and its two suppression blocks.

    The first block has, per variable, a row per level (``non-missing`` for numeric ones) and a
    ``missing`` row; each variable's rows add up to the group size, a count of the second
    block (``patients``), whose groups add up to the cohort size.

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
    meanings: dict[str, Spec] = {}

    def frame(items: Iterable[tuple[tuple[str, str], dict[str, int]]]) -> pl.DataFrame:
        rows = []
        for (variable, row), values in items:
            record: dict[str, Any] = {"variable": variable, "row": row}
            for g in groups:
                record[g] = values.get(g, 0)
                record[f"{g}#key"] = key = _t1_key(outcome, variable, row, g)
                meanings[key] = _t1_meaning(outcome, variable, row, g)
            rows.append(record)
        return _keyed(rows, schema)

    body = frame(cells.items())
    sizes_frame = frame([(("patients", "all"), size)])
    columns: list[Relation] = []
    for part in body.partition_by("variable", maintain_order=True):
        for g in groups:  # a variable's rows add up to its group's size
            total = _t1_key(outcome, "patients", "all", g)
            columns.append(((total, -1), *((k, 1) for k in part[f"{g}#key"])))
    return (
        long,
        Block(body, groups[1:], "overall", tuple(columns), meanings),
        Block(sizes_frame, groups[1:], "overall", meanings=meanings),
    )


def incidence_block(cohort: pl.DataFrame, outcomes: Sequence[str]) -> tuple[list[Any], Block]:
    """Cumulative incidence and rates per outcome; events and non-events add up to at-risk."""
    results, rows = [], []
    meanings: dict[str, Spec] = {}
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
        meanings |= {
            f"events|{o}": ((f"at|{o}", "true"), (f"inc|{o}", "true")),
            f"nonevents|{o}": ((f"at|{o}", "true"), (f"inc|{o}", "false")),
            f"atrisk|{o}": ((f"at|{o}", "true"),),
        }
    schema = {
        "outcome": pl.String,
        "events": pl.Int64,
        "nonevents": pl.Int64,
        "at_risk": pl.Int64,
    } | {f"{c}#key": pl.String for c in ("events", "nonevents", "at_risk")}
    frame = _keyed(rows, schema)
    return results, Block(frame, ("events", "nonevents"), "at_risk", meanings=meanings)


def combinations_block(cohort: pl.DataFrame, outcomes: Sequence[str]) -> Block:
    """Patients at risk of every outcome, by exact combination of incident outcomes."""
    table = outcome_combinations(cohort, outcomes, include_none=True)
    table = table.with_columns(("comb|" + pl.col("combination")).alias("n#key"))
    meanings: dict[str, Spec] = {}
    for name in table["combination"]:
        members = set(name.split("+"))
        meanings[f"comb|{name}"] = tuple(
            (f"{p}|{o}", "true" if p == "at" or o in members else "false")
            for o in outcomes
            for p in ("at", "inc")
        )
    return Block(table, ("n",), meanings=meanings)


def dependence_block(cohort: pl.DataFrame, outcomes: Sequence[str]) -> Block:
    """Pairwise 2x2 tables; the four cells of a pair add up to the pair's n."""
    table = pairwise_dependence(cohort, outcomes)
    pair = pl.col("outcome_1") + "|" + pl.col("outcome_2")
    table = table.with_columns(
        ("dep|" + pair + f"|{c}").alias(f"{c}#key") for c in ("a", "b", "c", "d", "n")
    )
    meanings: dict[str, Spec] = {}
    cells = {"a": ("true", "true"), "b": ("true", "false"), "c": ("false", "true")}
    cells |= {"d": ("false", "false")}
    for first, second in table.select("outcome_1", "outcome_2").iter_rows():
        at_risk = ((f"at|{first}", "true"), (f"at|{second}", "true"))
        meanings[f"dep|{first}|{second}|n"] = at_risk
        for c, (x, y) in cells.items():
            meanings[f"dep|{first}|{second}|{c}"] = (
                *at_risk,
                (f"inc|{first}", x),
                (f"inc|{second}", y),
            )
    return Block(table, ("a", "b", "c", "d"), total="n", meanings=meanings)


def quality_blocks(quality: pl.DataFrame) -> list[Block]:
    """Rows used and set aside, one block per source table; they add up to the rows read.

    The rows read of each table are not printed, but a reader may know them, so they are a
    count of the system (``qtotal|<table>``) that the lines add up to.
    """
    key = "q|" + pl.col("source_table") + "|" + pl.col("outcome") + "|" + pl.col("reason")
    table = quality.with_columns(pl.col("n_rows").cast(pl.Int64), key.alias("n_rows#key"))
    blocks = []
    for part in table.partition_by("source_table", maintain_order=True):
        total = f"qtotal|{part['source_table'][0]}"
        relation = ((total, -1), *((k, 1) for k in part["n_rows#key"]))
        extra = {total: int(part["n_rows"].sum())}
        blocks.append(Block(part, ("n_rows",), relations=(relation,), extra=extra))
    return blocks


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
        # a percentage of a shown count reveals its denominator, and so its group's size
        block_hidden = status[("patients", "all", group)][1] or any(
            h for (v, _, g), (_, h) in status.items() if v == var and g == group
        )
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
    gone = pl.any_horizontal(
        pl.col(c).str.starts_with("<") | (pl.col(c) == "*") for c in ("a", "b", "c", "d", "n")
    )
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
