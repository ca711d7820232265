"""Table 1 of each outcome: its suppression blocks, and Table 1 as published.

Each count of Table 1 is a cell of the report's one suppression system
(:mod:`._suppression`): the group sizes share keys with the cohort size and the events
of the incidence table, each variable's rows add up to its group's size, and every count is
described by the patients it counts (:mod:`._cells`). As published, Table 1 leaves out
every statistic that would reveal a hidden count or describe a few patients.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Sequence
from typing import Any

import polars as pl

from pipeline.compile import names
from pipeline.outputs.report._cells import Spec
from pipeline.outputs.report._suppression import Block, keyed_frame
from pipeline.stats import baseline_variables, smd_binary, smd_continuous, table_one
from pipeline.stats._disclosure import Relation, hidden_marker

_NUMERIC_STATS = ("mean", "sd", "median", "q1", "q3")
_STATES = {"false": "false", "true": "true", "null": "null"}


def exposure_size_key(group: str) -> str:
    """The key of an exposure group's size: Table 1 by exposure's column, a matched flow line."""
    return f"t1size|@{names.EXPOSURE}|{group}"


def _group_names(by: str) -> tuple[str, ...]:
    return ("overall", f"{by}=false", f"{by}=true", f"{by}=null")


def _t1_key(outcome: str, variable: str, row: str, group: str) -> str:
    if variable == "patients":
        special = ("N", *(f"t1size|{outcome}|{state}" for state in ("false", "true", "null")))
        groups = _group_names(names.outcome_columns(outcome).incident)
        return dict(zip(groups, special, strict=True))[group]
    if group == "overall":
        return f"t1|{variable}|{row}"
    return f"t1|{outcome}|{variable}|{row}|{group}"


def _t1_meaning(outcome: str, variable: str, row: str, group: str) -> Spec:
    """Whom a Table 1 count counts: its group's incident state, and its variable's level."""
    own = () if group == "overall" else ((f"inc|{outcome}", group.rsplit("=", 1)[1]),)
    return own + _variable_meaning(variable, row)


def _variable_meaning(variable: str, row: str) -> Spec:
    """Whom a row of Table 1 counts, whatever the group: a prevalent state, or a level."""
    if variable.startswith(names.PREVALENT_PREFIX):
        condition = variable.removeprefix(names.PREVALENT_PREFIX)
        return ((f"prev|{condition}", _STATES.get(row, "null")),)
    return () if variable == "patients" else ((variable, row),)


def _grouped_blocks(
    cohort: pl.DataFrame,
    by: str,
    groups: tuple[str, ...],
    variables: Sequence[str],
    key: Callable[[str, str, str], str],
    meaning: Callable[[str, str, str], Spec],
) -> tuple[pl.DataFrame, Block, Block]:
    """Table 1 by ``by`` and its two suppression blocks, with keys and meanings given.

    ``groups`` lists "overall" then every group's name (``"<by>=<value>"``); a group absent
    from the cohort counts 0.
    """
    long = table_one(cohort, by=by, variables=variables)
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
                record[f"{g}#key"] = k = key(variable, row, g)
                meanings[k] = meaning(variable, row, g)
            rows.append(record)
        return keyed_frame(rows, schema)

    body = frame(cells.items())
    sizes_frame = frame([(("patients", "all"), size)])
    columns: list[Relation] = []
    for part in body.partition_by("variable", maintain_order=True):
        for g in groups:  # a variable's rows add up to its group's size
            total = key("patients", "all", g)
            columns.append(((total, -1), *((k, 1) for k in part[f"{g}#key"])))
    return (
        long,
        Block(body, groups[1:], "overall", tuple(columns), meanings),
        Block(sizes_frame, groups[1:], "overall", meanings=meanings),
    )


def table_one_blocks(cohort: pl.DataFrame, outcome: str) -> tuple[pl.DataFrame, Block, Block]:
    """Table 1 by incident status of one outcome, and its two suppression blocks.

    The first block has, per variable, a row per level (``non-missing`` for numeric ones) and a
    ``missing`` row; each variable's rows add up to the group size, a count of the second
    block (``patients``), whose groups add up to the cohort size.

    Returns:
        The long Table 1 from :func:`pipeline.stats.table_one`, the variables block and the
        group-size block.
    """
    by = names.outcome_columns(outcome).incident
    variables = baseline_variables(cohort, exclude=[by, names.prevalent_column(outcome)])
    return _grouped_blocks(
        cohort,
        by,
        _group_names(by),
        variables,
        lambda variable, row, group: _t1_key(outcome, variable, row, group),
        lambda variable, row, group: _t1_meaning(outcome, variable, row, group),
    )


def exposure_groups(cohort: pl.DataFrame) -> tuple[str, ...]:
    """The names of the exposure Table 1's columns: overall, then each group in sorted order."""
    values = cohort[names.EXPOSURE].cast(pl.String).fill_null("null").unique().sort()
    return ("overall", *(f"{names.EXPOSURE}={v}" for v in values))


def exposure_table_one_blocks(cohort: pl.DataFrame) -> tuple[pl.DataFrame, Block, Block]:
    """Table 1 by exposure group (a new-user study), and its two suppression blocks.

    Laid out and related like :func:`table_one_blocks`. Its overall column counts the same
    patients as every outcome's overall column and shares their keys; each group's cells are
    described by the group (the ``exposure`` state of :mod:`._cells`' atoms) and the level,
    so the suppression sees, for instance, that the group's patients prevalent for an outcome
    are among that outcome's Table 1 cells.
    """
    by = names.EXPOSURE
    tag = f"@{by}"  # no condition name starts with "@", so keys cannot meet an outcome's

    def key(variable: str, row: str, group: str) -> str:
        if variable == "patients":
            return "N" if group == "overall" else exposure_size_key(group.rsplit("=", 1)[1])
        return (
            f"t1|{variable}|{row}" if group == "overall" else f"t1|{tag}|{variable}|{row}|{group}"
        )

    def meaning(variable: str, row: str, group: str) -> Spec:
        value = group.rsplit("=", 1)[-1]  # the atoms label a null group "missing", as a level
        own = () if group == "overall" else ((by, "missing" if value == "null" else value),)
        return own + _variable_meaning(variable, row)

    variables = baseline_variables(cohort, exclude=[by])
    return _grouped_blocks(cohort, by, exposure_groups(cohort), variables, key, meaning)


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
    """Table 1 by incident status as published (see :func:`_published`).

    The SMD compares the incident patients with those not incident.
    """
    by = names.outcome_columns(outcome).incident
    groups = _group_names(by)
    pair = (f"{by}=true", f"{by}=false")
    return _published(by, groups, long, blocks, hidden, threshold, no_means, pair)


def exposure_table_one_summary(
    long: pl.DataFrame,
    blocks: Sequence[Block],
    hidden: frozenset[str],
    threshold: int,
    no_means: frozenset[str] = frozenset(),
) -> pl.DataFrame:
    """Table 1 by exposure group as published (see :func:`_published`).

    With two groups, the SMD compares the first group of the columns (sorted by name) with the
    second, the comparison of an active-comparator design; with more there is no single pair,
    and no SMD.
    """
    groups = ("overall", *blocks[-1].counts)
    pair = (groups[1], groups[2]) if len(groups) == 3 else None
    return _published(names.EXPOSURE, groups, long, blocks, hidden, threshold, no_means, pair)


def _published(
    by: str,
    groups: Sequence[str],
    long: pl.DataFrame,
    blocks: Sequence[Block],
    hidden: frozenset[str],
    threshold: int,
    no_means: frozenset[str],
    pair: tuple[str, str] | None,
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
    for r in [{"variable": "patients", "level": None, "group": g} for g in groups] + list(
        long.iter_rows(named=True)
    ):
        var, group = r["variable"], r["group"]
        row = "all" if var == "patients" else (r["level"] or "non-missing")
        n, n_hidden = status[(var, row, group)]
        record = {
            "by": by,
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
    _add_smd(out, long, pair)
    schema = {
        "by": pl.String,
        "variable": pl.String,
        "level": pl.String,
        "group": pl.String,
        "n": pl.String,
        "percent": pl.Float64,
    } | dict.fromkeys(_NUMERIC_STATS, pl.Float64)
    schema |= {"missing": pl.String, "smd": pl.Float64}
    return pl.DataFrame(out, schema=schema, orient="row")


def _add_smd(out: list[dict[str, Any]], long: pl.DataFrame, pair: tuple[str, str] | None) -> None:
    """Put the SMD of the ``pair`` of groups on each variable's overall row (Austin 2009).

    It is computed from the unrounded statistics, and only where the statistics it is made of
    are published for both groups (the means and SDs, or the percentages): an SMD from a
    withheld mean or a hidden count would give it back. Without a pair every SMD is empty.
    """
    raw = {(r["variable"], r["level"], r["group"]): r for r in long.iter_rows(named=True)}
    published = {(r["variable"], r["level"], r["group"]): r for r in out}
    one, zero = pair or ("", "")
    for record in out:
        record["smd"] = None
        key = (record["variable"], record["level"])
        if pair is None or record["group"] != "overall" or record["variable"] == "patients":
            continue
        shown = [published.get((*key, g)) for g in (one, zero)]
        values = [raw.get((*key, g)) for g in (one, zero)]
        if None in shown or None in values:
            continue
        if record["level"] is None:
            if any(p["mean"] is None or p["sd"] is None for p in shown):  # type: ignore[index]
                continue
            a, b = values
            smd = smd_continuous(a["mean"], a["sd"], b["mean"], b["sd"])  # type: ignore[index]
        else:
            if any(p["percent"] is None for p in shown):  # type: ignore[index]
                continue
            a, b = values
            smd = smd_binary(a["percent"] / 100.0, b["percent"] / 100.0)  # type: ignore[index]
        record["smd"] = None if math.isnan(smd) else round(smd, 3)
