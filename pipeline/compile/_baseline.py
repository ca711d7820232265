"""Baseline quantities relative to each patient's index date, one pass per source.

``window_counts`` counts evidence in windows (eligibility steps, count covariates, Charlson
categories, first evidence of a condition) with one join of ``evidence_events`` to the index;
``measure_covariates`` summarises measurement values in windows. Windows are day offsets from
the index, both ends included; a missing value stays missing (NULL), never zero.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.codes import CHARLSON_CATEGORIES, HIERARCHY, WEIGHTS
from pipeline.compile import names
from pipeline.compile._context import (
    CompileContext,
    charlson_key,
    covariate_key,
    evidence_id,
    evidence_key,
    step_key,
)
from pipeline.compile._measurements import measure_relations
from pipeline.compile._plan import Stage
from pipeline.compile._sql import days_between, in_window, is_in, near_index
from pipeline.config import Condition, Covariate, Evidence, Window
from pipeline.measures import DERIVED_FROM

OFFSET = "e_offset"  # event date minus index date, in days


def _count(key: str, window: Window) -> exp.Expression:
    hit = exp.and_(
        exp.column("evidence", "e").eq(evidence_id(key)), in_window(window, exp.column(OFFSET))
    )
    return exp.func(
        "COALESCE",
        exp.Sum(this=exp.Case().when(hit, exp.column("n_rows", "e")).else_(exp.Literal.number(0))),
        exp.Literal.number(0),
    )


def _encounter_types(evidence: Evidence) -> tuple[str, ...] | None:
    """The types an encounter-kind evidence counts (empty: any), or None for other kinds."""
    if evidence.encounter is None:
        return None
    return tuple(t.lower() for t in evidence.encounter.type)


def window_columns(ctx: CompileContext) -> list[tuple[str, exp.Expression, tuple[str, ...]]]:
    """(column, aggregate, evidence keys) for counts read from ``evidence_events``."""
    columns: list[tuple[str, exp.Expression, tuple[str, ...]]] = []
    for i, criterion in enumerate(ctx.eligibility, start=1):
        rule = criterion.no_evidence
        if rule is not None and _encounter_types(rule.evidence) is None:
            key = step_key(i)
            columns.append((f"step_evidence_{i}", _count(key, rule.window), (key,)))
    for name, covariate in ctx.study.covariates.items():
        if covariate.count is not None and _encounter_types(covariate.count) is None:
            key = covariate_key(name)
            columns.append((names.count_column(name), _count(key, covariate.span), (key,)))
    if any(c.charlson for c in ctx.study.covariates.values()):
        for category in CHARLSON_CATEGORIES:
            key = charlson_key(category.name)
            columns.append((f"charlson_{category.name}", _count(key, (None, 0)), (key,)))
    for outcome in ctx.outcomes:
        days = ctx.study.outcomes.clear_before_for(outcome.condition)
        if days is not None:
            keys = clear_keys(outcome)
            hit = exp.and_(
                exp.column("evidence", "e").isin(*(evidence_id(k) for k in keys)),
                in_window((-days, 0), exp.column(OFFSET)),
            )
            count = exp.Sum(
                this=exp.Case().when(hit, exp.column("n_rows", "e")).else_(exp.Literal.number(0))
            )
            columns.append((f"clear_evidence_{outcome.condition}", count, keys))
    for name in ctx.first_evidence_of:
        condition = ctx.catalog.get(name)
        keys = tuple(
            evidence_key(name, e)
            for e, ev in sorted(condition.evidence.items())
            if not ev.condition
        )
        first = exp.Min(
            this=exp.Case().when(
                exp.and_(
                    exp.column("evidence", "e").isin(*(evidence_id(k) for k in keys)),
                    exp.column(OFFSET) <= 0,
                ),
                exp.column("event_date", "e"),
            )
        )
        columns.append((f"first_evidence_{name}", first, keys))
    return columns


def clear_keys(condition: Condition) -> tuple[str, ...]:
    """The evidence whose presence before index clears a patient from being at risk.

    Every evidence some rule of the condition needs, read from the extract (not ``absent``
    evidence, which speaks against the condition, nor another condition's onset).
    """
    needed = {name for rule in condition.rules for name in rule.need}
    return tuple(
        evidence_key(condition.condition, name)
        for name, ev in sorted(condition.evidence.items())
        if name in needed and ev.condition is None
    )


def encounter_columns(ctx: CompileContext) -> list[tuple[str, Window, tuple[str, ...]]]:
    """(column, window, types) for counts of encounters, read straight from the encounters.

    Counting encounters through ``evidence_events`` would copy the whole encounters table into
    it; counting them here touches only the encounters inside the windows.
    """
    columns: list[tuple[str, Window, tuple[str, ...]]] = []
    for i, criterion in enumerate(ctx.eligibility, start=1):
        if criterion.encounters is not None:
            columns.append((f"step_evidence_{i}", criterion.encounters.window, ()))
        if criterion.no_evidence is not None:
            types = _encounter_types(criterion.no_evidence.evidence)
            if types is not None:
                columns.append((f"step_evidence_{i}", criterion.no_evidence.window, types))
    for name, covariate in ctx.study.covariates.items():
        types = _encounter_types(covariate.count) if covariate.count is not None else None
        if types is not None:
            columns.append((names.count_column(name), covariate.span, types))
    return columns


def _index_dates() -> exp.Expression:
    """``index_dates AS i``, as every window join of this module reads it."""
    return exp.to_table(names.INDEX_DATES).as_("i")


def _evidence_counts(ctx: CompileContext) -> exp.Query | None:
    columns = window_columns(ctx)
    if not columns:
        return None
    keys = sorted({k for _, _, ks in columns for k in ks})
    offset = days_between(exp.column("index_date", "i"), exp.column("event_date", "e"))
    events = (
        exp.select("patient_id", "evidence", "event_date", "n_rows")
        .from_(names.EVIDENCE_EVENTS)
        .where(exp.column("evidence").isin(*(evidence_id(k) for k in keys)))
        .where(near_index(exp.column("event_date"), ctx.index_range, (None, 0)))
    )
    joined = (
        exp.select(
            exp.column("patient_id", "i"),
            exp.column("evidence", "e"),
            exp.column("event_date", "e"),
            exp.column("n_rows", "e"),
            offset.as_(OFFSET),
        )
        .from_(_index_dates())
        .join(
            events.subquery("e"),
            on=exp.and_(
                exp.column("patient_id", "e").eq(exp.column("patient_id", "i")),
                exp.column("event_date", "e") <= exp.column("index_date", "i"),
            ),
        )
    )
    return (
        exp.select("patient_id", *(aggregate.as_(name) for name, aggregate, _ in columns))
        .from_(joined.subquery("e"))
        .group_by("patient_id")
    )


def _encounter_counts(ctx: CompileContext) -> exp.Query | None:
    columns = encounter_columns(ctx)
    if not columns:
        return None
    starts = [window[0] for _, window, _ in columns]
    earliest = None if any(s is None for s in starts) else min(s for s in starts if s is not None)
    offset = days_between(exp.column("index_date", "i"), exp.column("encounter_date", "e"))
    # Exact duplicate encounter rows count once: distinct (day, type) inside the widest window.
    visits = (
        exp.select(
            exp.column("patient_id", "e"),
            exp.column("encounter_date", "e"),
            exp.column("encounter_type", "e"),
            offset.as_(OFFSET),
        )
        .distinct()
        .from_(exp.to_table(names.ENCOUNTER_ROWS).as_("e"))
        .where(near_index(exp.column("encounter_date", "e"), ctx.index_range, (earliest, 0)))
        .join(
            _index_dates(),
            on=exp.and_(
                exp.column("patient_id", "i").eq(exp.column("patient_id", "e")),
                in_window((earliest, 0), offset.copy()),
            ),
        )
    )
    aggregates = []
    for name, window, types in columns:
        hit = in_window(window, exp.column(OFFSET))
        if types:
            hit = exp.and_(hit, is_in(exp.column("encounter_type"), types))
        counted = exp.Case().when(hit, exp.Literal.number(1)).else_(exp.Literal.number(0))
        aggregates.append(exp.Sum(this=counted).as_(name))
    return exp.select("patient_id", *aggregates).from_(visits.subquery("v")).group_by("patient_id")


def window_counts_stage(ctx: CompileContext) -> Stage | None:
    """``window_counts``: per source patient, counts in windows around the index date.

    Counts are 0, never missing, for a patient with nothing in the window; first-evidence dates
    stay missing when there is none.
    """
    parts = [
        ("ev", _evidence_counts(ctx), names.EVIDENCE_EVENTS),
        ("en", _encounter_counts(ctx), names.ENCOUNTER_ROWS),
    ]
    present = [(alias, q, source) for alias, q, source in parts if q is not None]
    if not present:
        return None
    selected: list[exp.Expression] = [exp.column("patient_id", "i")]
    query = exp.select().from_(_index_dates())
    for alias, part, _ in present:
        for projection in part.selects[1:]:
            name = projection.alias_or_name
            value: exp.Expression = exp.column(name, alias)
            if not name.startswith("first_evidence_"):
                value = exp.func("COALESCE", value, exp.Literal.number(0))
            selected.append(value.as_(name))
        query = query.join(
            part.subquery(alias),
            on=exp.column("patient_id", alias).eq(exp.column("patient_id", "i")),
            join_type="left",
        )
    return Stage(
        names.WINDOW_COUNTS,
        query.select(*selected),
        "per patient, evidence and encounters counted in windows around the index date",
    )


_SUMMARIES = {"mean": exp.Avg, "minimum": exp.Min, "maximum": exp.Max}


def _baseline_values(ctx: CompileContext, measures: list[str], earliest: int | None) -> exp.Query:
    """Exact values of the covariate measures, near enough to the index, read once."""
    relations = sorted({r for m in measures for r in measure_relations(ctx, m)})
    parts = [
        exp.select("patient_id", "measure", "obs_date", "value", "derived")
        .from_(relation)
        .where(
            exp.and_(
                is_in(exp.column("measure"), measures),
                exp.column("qualifier").is_(exp.null()),
                near_index(exp.column("obs_date"), ctx.index_range, (earliest, 0)),
            )
        )
        for relation in relations
    ]
    union: exp.Query = parts[0]
    for part in parts[1:]:
        union = union.union(part, distinct=False)
    offset = days_between(exp.column("index_date", "i"), exp.column("obs_date", "v"))
    return (
        exp.select(
            exp.column("patient_id", "v"),
            exp.column("measure", "v"),
            exp.column("obs_date", "v"),
            exp.column("value", "v"),
            exp.column("derived", "v"),
            offset.as_(OFFSET),
        )
        .from_(union.subquery("v"))
        .join(
            _index_dates(),
            on=exp.and_(
                exp.column("patient_id", "i").eq(exp.column("patient_id", "v")),
                in_window((earliest, 0), offset.copy()),
            ),
        )
    )


def _summary(name: str, covariate: Covariate) -> exp.Query:
    measure = covariate.latest or covariate.mean or covariate.minimum or covariate.maximum
    assert measure is not None  # only called for measure covariates
    values = (
        exp.select("patient_id", "obs_date", "value", "derived")
        .from_("baseline_values")
        .where(
            exp.and_(
                exp.column("measure").eq(measure), in_window(covariate.span, exp.column(OFFSET))
            )
        )
    )
    if covariate.latest is None:
        aggregate = _SUMMARIES[covariate.kind](this=exp.column("value"))
        return (
            exp.select("patient_id", aggregate.as_(f"m_{name}"))
            .from_(values.subquery("v"))
            .group_by("patient_id")
        )
    last = exp.Window(
        this=exp.Max(this=exp.column("obs_date")), partition_by=[exp.column("patient_id")]
    )
    ranked = exp.select("patient_id", "obs_date", "value", "derived", last.as_("last_date")).from_(
        values.subquery("v")
    )
    return (
        exp.select(
            "patient_id",
            exp.Avg(this=exp.column("value")).as_(f"m_{name}"),
            exp.column("obs_date").as_(f"m_{name}_date"),
            exp.func("BOOL_OR", exp.column("derived")).as_(f"m_{name}_derived"),
        )
        .from_(ranked.subquery("r"))
        .where(exp.column("obs_date").eq(exp.column("last_date")))
        .group_by("patient_id", "obs_date")
    )


MEASURE_KINDS = ("latest", "mean", "minimum", "maximum")


def measure_covariates_stage(ctx: CompileContext) -> Stage | None:
    """``measure_covariates``: per source patient, each measure covariate's value.

    The values near the index are read once (``baseline_values``) and each covariate
    summarises its own measure and window from them.
    """
    wanted = [(n, c) for n, c in ctx.study.covariates.items() if c.kind in MEASURE_KINDS]
    if not wanted:
        return None
    measures = sorted({c.latest or c.mean or c.minimum or c.maximum or "" for _, c in wanted})
    starts = [c.span[0] for _, c in wanted]
    earliest = None if any(s is None for s in starts) else min(s for s in starts if s is not None)
    query = exp.select(exp.column("patient_id", "i")).from_(_index_dates())
    for number, (name, covariate) in enumerate(wanted):
        alias = f"c{number}"
        columns = [f"m_{name}"]
        if covariate.latest:
            columns += [f"m_{name}_date", f"m_{name}_derived"]
        query = query.select(*(exp.column(c, alias) for c in columns)).join(
            _summary(name, covariate).subquery(alias),
            on=exp.column("patient_id", alias).eq(exp.column("patient_id", "i")),
            join_type="left",
        )
    return Stage(
        names.MEASURE_COVARIATES,
        query.with_("baseline_values", as_=_baseline_values(ctx, measures, earliest)),
        "per patient, measurement covariates summarised in their windows",
    )


def charlson_score(weights: str) -> exp.Expression:
    """The Charlson index from ``window_counts``'s category columns, with the hierarchy."""
    present = {
        c.name: exp.func("COALESCE", exp.column(f"charlson_{c.name}", "w"), exp.Literal.number(0))
        > 0
        for c in CHARLSON_CATEGORIES
    }
    severe_of = dict(HIERARCHY)
    terms: list[exp.Expression] = []
    for category in CHARLSON_CATEGORIES:
        weight = WEIGHTS[weights][category.name]
        if weight == 0:
            continue
        counts = present[category.name].copy()
        if category.name in severe_of:
            counts = exp.and_(counts, exp.not_(present[severe_of[category.name]].copy()))
        terms.append(
            exp.Case().when(counts, exp.Literal.number(weight)).else_(exp.Literal.number(0))
        )
    total: exp.Expression = terms[0]
    for term in terms[1:]:
        total = exp.Add(this=total, expression=term)
    return exp.cast(total, "INT")


def covariate_column(name: str, covariate: Covariate) -> list[exp.Expression]:
    """The analysis-table column(s) of one covariate (read from eligibility ``f``, ``w``, ``m``)."""
    kind = covariate.kind
    if kind == "condition":
        onset = exp.column(names.onset_column(covariate.condition), "f")
        prevalent = exp.and_(onset.is_(exp.null()).not_(), onset <= exp.column("index_date", "f"))
        return [exp.func("COALESCE", prevalent, exp.false()).as_(name)]
    if kind == "count":
        return [exp.cast(exp.column(names.count_column(name), "w"), "INT").as_(name)]
    if kind == "days_since_first_evidence":
        first = exp.column(f"first_evidence_{covariate.days_since_first_evidence}", "w")
        return [exp.cast(days_between(first, exp.column("index_date", "f")), "INT").as_(name)]
    if kind == "charlson":
        assert covariate.charlson is not None  # kind is charlson
        return [charlson_score(covariate.charlson.weights).as_(name)]
    columns = [exp.cast(exp.column(f"m_{name}", "m"), "DOUBLE").as_(name)]
    if covariate.latest:
        columns.append(exp.column(f"m_{name}_date", "m").as_(f"{name}_date"))
        if covariate.latest in DERIVED_FROM:
            columns.append(exp.column(f"m_{name}_derived", "m").as_(f"{name}_derived"))
    return columns
