"""Stages from the source population to the analysis table: eligibility, attrition, follow-up.

Every eligibility step is one boolean column; the attrition log counts patients who pass all
steps before it and fail it, so each removed patient is counted exactly once, in order.
"""

from __future__ import annotations

import datetime as dt

from sqlglot import exp

from pipeline.compile._baseline import (
    covariate_column,
    measure_covariates_stage,
    window_counts_stage,
)
from pipeline.compile._contact import (
    DEFAULT_STEP_TEXT,
    contact_stages,
    eligibility_with_default,
    in_contact_predicate,
    last_contact_column,
    negative_followup_check,
)
from pipeline.compile._context import CompileContext
from pipeline.compile._index import index_description, index_stage
from pipeline.compile._outcomes import at_risk, cleared_outcomes, outcome_columns
from pipeline.compile._plan import Stage
from pipeline.compile._rules import lookback_stages
from pipeline.compile._sql import add_days, age_in_years, days_between, expression, value
from pipeline.config import Criterion

_STEP_NAMES = {
    "history_days": "history",
    "registered_days": "registration",
    "no_evidence": "no_prior_evidence",
    "at_risk_of_any_outcome": "at_risk_any_outcome",
}

_BASE_COLUMNS = (
    "patient_id",
    "sex",
    "birth_date",
    "death_date",
    "practice_id",
    "registration_date",
    "deregistration_date",
    "index_date",
    "first_encounter",
    "last_encounter",
    "age_at_index",
)


def _step_name(criterion: Criterion) -> str:
    return _STEP_NAMES.get(criterion.kind, criterion.kind)


def _window_text(window: tuple[int | None, int]) -> str:
    start, end = window
    start_text = "all history" if start is None else f"day {start}"
    return f"from {start_text} to day {end} of index"


def _step(ctx: CompileContext, number: int, criterion: Criterion) -> tuple[exp.Expression, str]:
    """The predicate of one eligibility step and its plain description."""
    column = exp.column
    if criterion.sex is not None:
        sexes = sorted(criterion.sex)
        return (
            column("sex").isin(*(exp.convert(s) for s in sexes)),
            f"sex recorded as {' or '.join(sexes)}",
        )
    if criterion.alive_at_index:
        return (
            expression("death_date IS NULL OR death_date > index_date"),
            "alive at index (no death on or before the index date)",
        )
    if criterion.age is not None:
        low, high = criterion.age.between
        return (
            expression("age_at_index BETWEEN :low AND :high", low=low, high=high),
            f"age at index between {low} and {high} years",
        )
    if criterion.history_days is not None:
        days = criterion.history_days
        return (
            days_between(column("first_encounter"), column("index_date")) >= days,
            f"first encounter at least {days} days before index",
        )
    if criterion.registered_days is not None:
        days = criterion.registered_days
        return (
            days_between(column("registration_date"), column("index_date")) >= days,
            f"registered at least {days} days before index",
        )
    if criterion.encounters is not None:
        rule = criterion.encounters
        return (
            column(f"step_evidence_{number}") >= rule.at_least,
            f"at least {rule.at_least} encounters {_window_text(rule.window)}",
        )
    if criterion.practice is not None:
        return (
            column("practice_id").isin(*(exp.convert(p) for p in sorted(criterion.practice))),
            f"registered at practice {', '.join(sorted(criterion.practice))}",
        )
    if criterion.not_prevalent is not None:
        onset = column(f"onset_{criterion.not_prevalent}")
        return (
            exp.or_(onset.is_(exp.null()), onset > column("index_date")),
            f"no {criterion.not_prevalent} on or before the index date",
        )
    if criterion.no_evidence is not None:
        return (
            column(f"step_evidence_{number}").eq(0),
            f"none of the listed evidence {_window_text(criterion.no_evidence.window)}",
        )
    if criterion.in_contact_at_index is not None:
        return in_contact_predicate(criterion)
    names = [c.condition for c in ctx.outcomes]
    return (
        exp.or_(*(at_risk(ctx, n) for n in names)),
        f"at risk of at least one outcome (not prevalent for all of {', '.join(names)})",
    )


def _prevalent(name: str) -> exp.Expression:
    onset = exp.column(f"onset_{name}")
    return exp.func(
        "COALESCE",
        exp.and_(onset.is_(exp.null()).not_(), onset <= exp.column("index_date")),
        exp.false(),
    )


def _followup_candidates(ctx: CompileContext) -> dict[str, exp.Expression]:
    study = ctx.study
    index = exp.column("index_date")
    if study.outcomes.horizon_days is not None:
        horizon = add_days(index, study.outcomes.horizon_days)
    else:
        years = exp.DateAdd(
            this=index, expression=value(study.outcomes.horizon_years), unit=exp.var("YEAR")
        )
        horizon = exp.cast(years, exp.DataType.Type.DATE)
    candidates = {
        "death": exp.column("death_date"),
        "end_of_data": value(study.end_of_data),
        "deregistration": exp.column("deregistration_date"),
        "horizon": horizon,
    }
    if study.followup.lost_contact_after_days is not None:
        candidates["lost_contact"] = add_days(
            last_contact_column(study), study.followup.lost_contact_after_days
        )
    return {reason: candidates[reason] for reason in study.followup.end_at}


def _with_followup(ctx: CompileContext, source: exp.Expression) -> exp.Query:
    """Add ``horizon_end``, ``followup_end`` and ``end_reason`` to every source patient."""
    candidates = _followup_candidates(ctx)
    far = value(dt.date(9999, 12, 31))
    followup_end = exp.func(
        "LEAST", *(exp.func("COALESCE", e.copy(), far.copy()) for e in candidates.values())
    )
    reason = exp.Case()
    for name, candidate in candidates.items():
        reason = reason.when(candidate.copy().eq(exp.column("followup_end")), value(name))
    inner = exp.select(
        exp.Star(),
        candidates["horizon"].copy().as_("horizon_end"),
        followup_end.as_("followup_end"),
    ).from_(source)
    return exp.select(exp.Star(), reason.as_("end_reason")).from_(inner.subquery("fu"))


def _lookback_outcomes(ctx: CompileContext) -> list[str]:
    return [
        o.condition
        for o in ctx.outcomes
        if ctx.study.outcomes.lookback_for(o.condition) is not None
    ]


def _onset_column(name: str, lookback: list[str]) -> exp.Expression:
    """A condition's onset: from its look-back stage when it has one, else from all history."""
    if name in lookback:
        return exp.column("onset_date", f"lb{lookback.index(name)}").as_(f"onset_{name}")
    return exp.column(f"onset_{name}", "o")


def _eligibility_query(ctx: CompileContext, steps: list[exp.Expression]) -> exp.Query:
    names = [c.condition for c in ctx.outcomes]
    onset_columns = [f"onset_{n}" for n in ctx.flagged]
    lookback = _lookback_outcomes(ctx)
    has_windows = window_counts_stage(ctx) is not None
    window_columns = [
        f"step_evidence_{i}"
        for i, c in enumerate(ctx.eligibility, 1)
        if c.encounters or c.no_evidence
    ]
    cleared = cleared_outcomes(ctx)
    base = (
        exp.select(
            exp.column("patient_id", "i"),
            exp.column("sex", "p"),
            exp.column("birth_date", "p"),
            exp.column("death_date", "p"),
            exp.column("practice_id", "p"),
            exp.column("registration_date", "p"),
            exp.column("deregistration_date", "p"),
            exp.column("index_date", "i"),
            exp.column("first_encounter", "s"),
            exp.column("last_encounter", "s"),
            age_in_years(birth=exp.column("birth_date", "p"), on=exp.column("index_date", "i")).as_(
                "age_at_index"
            ),
            *(_onset_column(c, lookback) for c in ctx.flagged),
            *(exp.column(c, "w") for c in window_columns),
            *(
                exp.func("COALESCE", exp.column(f"clear_evidence_{n}", "w"), 0).as_(
                    f"clear_evidence_{n}"
                )
                for n in cleared
            ),
            *_contact_columns(ctx),
        )
        .from_("index_dates AS i")
        .join("patient_base AS p", on="p.patient_id = i.patient_id")
        .join("encounter_summary AS s", on="s.patient_id = i.patient_id")
        .join("condition_onsets AS o", on="o.patient_id = i.patient_id", join_type="left")
    )
    for number, name in enumerate(lookback):
        alias = f"lb{number}"
        base = base.join(
            exp.to_table(f"onset_{name}_lookback").as_(alias),
            on=exp.column("patient_id", alias).eq(exp.column("patient_id", "i")),
            join_type="left",
        )
    if has_windows:
        base = base.join("window_counts AS w", on="w.patient_id = i.patient_id", join_type="left")
    if ctx.study.followup.contact == "any_activity":
        base = base.join("last_contact AS lc", on="lc.patient_id = i.patient_id", join_type="left")
    if _has_contact_step(ctx):
        base = base.join(
            "contact_at_index AS ci", on="ci.patient_id = i.patient_id", join_type="left"
        )
    with_prevalence = exp.select(
        exp.Star(), *(_prevalent(n).as_(f"prevalent_{n}") for n in names)
    ).from_(base.subquery("b"))
    with_followup = _with_followup(ctx, with_prevalence.subquery("v"))
    flags = [
        exp.func("COALESCE", predicate, exp.false()).as_(f"step_{i}")
        for i, predicate in enumerate(steps, start=1)
    ]
    return exp.select(
        *_BASE_COLUMNS,
        *onset_columns,
        *(f"prevalent_{n}" for n in names),
        *(f"clear_evidence_{n}" for n in cleared),
        "horizon_end",
        "followup_end",
        "end_reason",
        *flags,
    ).from_(with_followup.subquery("f"))


def _has_contact_step(ctx: CompileContext) -> bool:
    return any(c.in_contact_at_index is not None for c in ctx.eligibility)


def _contact_columns(ctx: CompileContext) -> list[exp.Expression]:
    columns: list[exp.Expression] = []
    if ctx.study.followup.contact == "any_activity":
        columns.append(exp.column("last_contact", "lc"))
    if _has_contact_step(ctx):
        columns.append(exp.column("last_contact_by_index", "ci"))
    return columns


def _complete_followup() -> tuple[exp.Expression, str]:
    return (
        exp.or_(
            exp.column("followup_end") >= exp.column("horizon_end"),
            exp.column("end_reason").eq("death"),
        ),
        "follow-up reaches the horizon or ends at death",
    )


def cohort_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """Index, baseline windows, eligibility flags, the attrition log and the analysis table."""
    study = ctx.study
    steps = [_step(ctx, i, c) for i, c in enumerate(ctx.eligibility, start=1)]
    names = [_step_name(c) for c in ctx.eligibility]
    if eligibility_with_default(study)[1]:
        predicate, text = steps[0]
        steps[0] = (predicate, f"{text} ({DEFAULT_STEP_TEXT})")
    if study.followup.incomplete == "exclude":
        steps.append(_complete_followup())
        names.append("complete_followup")
    present = {"coded_events"} if ctx.uses_coded_events else set()
    present |= {"src_measurements"} if ctx.measures else set()
    contact = contact_stages(study, ctx.eligibility, tuple(sorted(present)))
    stages = [index_stage(ctx), *lookback_stages(ctx), *contact]
    optional = [window_counts_stage(ctx), measure_covariates_stage(ctx)]
    stages += [stage for stage in optional if stage is not None]
    depends = ["index_dates", "patient_base", "encounter_summary", "condition_onsets"]
    depends += [f"onset_{n}_lookback" for n in _lookback_outcomes(ctx)]
    if optional[0] is not None:
        depends.append("window_counts")
    depends += [s.name for s in contact if s.name in ("last_contact", "contact_at_index")]
    stages.append(
        Stage(
            "eligibility",
            _eligibility_query(ctx, [predicate for predicate, _ in steps]),
            tuple(depends),
            "the source population with follow-up and one pass/fail column per eligibility step",
        )
    )
    stages.append(
        Stage(
            "attrition",
            _attrition_query(
                [(name, text) for name, (_, text) in zip(names, steps, strict=True)],
                index_text=index_description(ctx),
            ),
            ("eligibility", "patient_base"),
            "patients in the extract, without an index date, and at each eligibility step",
        )
    )
    excluded_at = exp.Case()
    for i, name in enumerate(names, start=1):
        excluded_at = excluded_at.when(exp.not_(exp.column(f"step_{i}")), value(name))
    stages.append(
        Stage(
            "population",
            exp.select("patient_id", "index_date", excluded_at.as_("excluded_at")).from_(
                "eligibility"
            )
            if names
            else exp.select(
                "patient_id", "index_date", exp.cast(exp.null(), "VARCHAR").as_("excluded_at")
            ).from_("eligibility"),
            ("eligibility",),
            "the source population with the first eligibility step each patient failed",
        )
    )
    cohort_depends = ["eligibility", *(s.name for s in optional if s is not None)]
    stages.append(
        Stage(
            "cohort",
            _cohort_query(
                ctx,
                len(steps),
                has_windows=optional[0] is not None,
                has_measures=optional[1] is not None,
            ),
            tuple(cohort_depends),
            "the analysis table: one row per eligible patient",
        )
    )
    stages.append(negative_followup_check())
    return tuple(stages)


def _attrition_query(steps: list[tuple[str, str]], *, index_text: str) -> exp.Query:
    # The whole extract first: patients without an index date are the first removed.
    extract = exp.select(exp.func("COUNT", exp.Star())).from_("patient_base")
    counts = [exp.func("COUNT", exp.Star()).as_("n_0"), extract.subquery().as_("n_all")]
    condition: exp.Expression = exp.column("step_1")
    for i in range(1, len(steps) + 1):
        if i > 1:
            condition = exp.and_(condition, exp.column(f"step_{i}"))
        passed = exp.Case().when(condition.copy(), exp.Literal.number(1))
        counts.append(
            exp.func(
                "COALESCE",
                exp.Sum(this=passed.else_(exp.Literal.number(0))),
                exp.Literal.number(0),
            ).as_(f"n_{i}")
        )
    totals = exp.select(*counts).from_("eligibility")
    rows = [
        exp.select(
            exp.Literal.number(-2).as_("step_number"),
            value("patients_in_extract").as_("step"),
            value("patients in the extract").as_("description"),
            exp.column("n_all").as_("patients_before"),
            exp.Literal.number(0).as_("removed"),
            exp.column("n_all").as_("remaining"),
        ).from_("totals"),
        exp.select(
            exp.Literal.number(-1),
            value("without_index_date"),
            value("without an index date"),
            exp.column("n_all"),
            exp.column("n_all") - exp.column("n_0"),
            exp.column("n_0"),
        ).from_("totals"),
        exp.select(
            exp.Literal.number(0),
            value("source_population"),
            value(index_text),
            exp.column("n_0"),
            exp.Literal.number(0),
            exp.column("n_0"),
        ).from_("totals"),
    ]
    for i, (name, text) in enumerate(steps, start=1):
        rows.append(
            exp.select(
                exp.Literal.number(i),
                value(name),
                value(text),
                exp.column(f"n_{i - 1}"),
                exp.column(f"n_{i - 1}") - exp.column(f"n_{i}"),
                exp.column(f"n_{i}"),
            ).from_("totals")
        )
    union = rows[0]
    for row in rows[1:]:
        union = union.union(row, distinct=False)
    typed = exp.select(
        exp.cast(exp.column("step_number"), "INT").as_("step_number"),
        "step",
        "description",
        exp.cast(exp.column("patients_before"), "BIGINT").as_("patients_before"),
        exp.cast(exp.column("removed"), "BIGINT").as_("removed"),
        exp.cast(exp.column("remaining"), "BIGINT").as_("remaining"),
    ).from_(union.subquery("steps"))
    return typed.with_("totals", as_=totals)


def _cohort_query(
    ctx: CompileContext, n_steps: int, *, has_windows: bool, has_measures: bool
) -> exp.Query:
    column = exp.column
    query = exp.select(
        column("patient_id", "f"),
        column("index_date", "f"),
        exp.cast(column("age_at_index", "f"), "INT").as_("age_at_index"),
        column("sex", "f"),
        *(c for name, cov in ctx.study.covariates.items() for c in covariate_column(name, cov)),
        *(
            c
            for outcome in ctx.outcomes
            for c in outcome_columns(
                outcome.condition,
                cleared=ctx.study.outcomes.clear_before_for(outcome.condition) is not None,
            )
        ),
        column("followup_end", "f"),
        exp.cast(days_between(column("index_date", "f"), column("followup_end", "f")), "INT").as_(
            "followup_days"
        ),
        column("end_reason", "f"),
    ).from_("eligibility AS f")
    if has_windows:
        query = query.join("window_counts AS w", on="w.patient_id = f.patient_id", join_type="left")
    if has_measures:
        query = query.join(
            "measure_covariates AS m", on="m.patient_id = f.patient_id", join_type="left"
        )
    if n_steps:
        query = query.where(exp.and_(*(column(f"step_{i}", "f") for i in range(1, n_steps + 1))))
    return query
