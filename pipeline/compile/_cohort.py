"""The passes from the source population to the analysis table (``COHORT_PASSES``).

Index, look-back onsets, contact, baseline windows, eligibility, attrition and population, the
analysis table: each pass takes the draft plan and returns it with its stages added, and finds
what earlier passes built through the draft (``draft.has``), never by rebuilding it. Every
eligibility step is one boolean column of ``eligibility`` (the log: ``compile/_attrition.py``).
"""

from __future__ import annotations

import datetime as dt

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._attrition import attrition_query
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
from pipeline.compile._draft import Draft, Pass
from pipeline.compile._exposure import exposure_index_columns, exposure_steps
from pipeline.compile._index import index_stage
from pipeline.compile._outcomes import at_risk, cleared_outcomes, outcome_expressions
from pipeline.compile._plan import Stage
from pipeline.compile._rules import lookback_stages
from pipeline.compile._sources import coded_tables
from pipeline.compile._sql import add_days, age_in_years, days_between, expression, value
from pipeline.compile.names import (
    clear_evidence_column,
    judged_stage,
    onset_column,
    prevalent_column,
    step_column,
    step_evidence_column,
)
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
            column(step_evidence_column(number)) >= rule.at_least,
            f"at least {rule.at_least} encounters {_window_text(rule.window)}",
        )
    if criterion.practice is not None:
        return (
            column("practice_id").isin(*(exp.convert(p) for p in sorted(criterion.practice))),
            f"registered at practice {', '.join(sorted(criterion.practice))}",
        )
    if criterion.not_prevalent is not None:
        onset = column(onset_column(criterion.not_prevalent))
        return (
            exp.or_(onset.is_(exp.null()), onset > column("index_date")),
            f"no {criterion.not_prevalent} on or before the index date",
        )
    if criterion.no_evidence is not None:
        return (
            column(step_evidence_column(number)).eq(0),
            f"none of the listed evidence {_window_text(criterion.no_evidence.window)}",
        )
    if criterion.in_contact_at_index is not None:
        return in_contact_predicate(criterion)
    outcomes = [c.condition for c in ctx.outcomes]
    return (
        exp.or_(*(at_risk(ctx, n) for n in outcomes)),
        f"at risk of at least one outcome (not prevalent for all of {', '.join(outcomes)})",
    )


def _prevalent(name: str) -> exp.Expression:
    onset = exp.column(onset_column(name))
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
        return exp.column("onset_date", f"lb{lookback.index(name)}").as_(onset_column(name))
    return exp.column(onset_column(name), "o")


def _eligibility_query(
    ctx: CompileContext, steps: list[exp.Expression], read: set[str]
) -> exp.Query:
    """The eligibility table; ``read``: which optional earlier stages the plan has."""
    outcomes = [c.condition for c in ctx.outcomes]
    onset_columns = [onset_column(n) for n in ctx.flagged]
    lookback = _lookback_outcomes(ctx)
    window_columns = [
        step_evidence_column(i)
        for i, c in enumerate(ctx.eligibility, 1)
        if c.encounters or c.no_evidence
    ]
    cleared = cleared_outcomes(ctx)
    exposure = exposure_index_columns() if ctx.study.exposure else ()
    base = exp.select(
        exp.column("patient_id", "i"),
        exp.column("sex", "p"),
        exp.column("birth_date", "p"),
        exp.column("death_date", "p"),
        exp.column("practice_id", "p"),
        exp.column("registration_date", "p"),
        exp.column("deregistration_date", "p"),
        exp.column("index_date", "i"),
        *(exp.column(c, "i") for c in exposure),
        exp.column("first_encounter", "s"),
        exp.column("last_encounter", "s"),
        age_in_years(birth=exp.column("birth_date", "p"), on=exp.column("index_date", "i")).as_(
            "age_at_index"
        ),
        *(_onset_column(c, lookback) for c in ctx.flagged),
        *(exp.column(c, "w") for c in window_columns),
        *(
            exp.func("COALESCE", exp.column(clear_evidence_column(n), "w"), 0).as_(
                clear_evidence_column(n)
            )
            for n in cleared
        ),
        *_contact_columns(ctx, read),
    ).from_(exp.to_table(names.INDEX_DATES).as_("i"))
    base = _joined(base, names.PATIENT_BASE, "p", left=False)
    base = _joined(base, names.ENCOUNTER_SUMMARY, "s", left=False)
    base = _joined(base, names.CONDITION_ONSETS, "o")
    for number, name in enumerate(lookback):
        alias = f"lb{number}"
        base = _joined(base, names.onset_stage(name, lookback=True), alias)
    for stage, alias in _OPTIONAL_JOINS:
        if stage in read:
            base = _joined(base, stage, alias)
    with_prevalence = exp.select(
        exp.Star(), *(_prevalent(n).as_(prevalent_column(n)) for n in outcomes)
    ).from_(base.subquery("b"))
    with_followup = _with_followup(ctx, with_prevalence.subquery("v"))
    flags = [
        exp.func("COALESCE", predicate, exp.false()).as_(step_column(i))
        for i, predicate in enumerate(steps, start=1)
    ]
    return exp.select(
        *_BASE_COLUMNS,
        *exposure,
        *onset_columns,
        *(prevalent_column(n) for n in outcomes),
        *(clear_evidence_column(n) for n in cleared),
        "horizon_end",
        "followup_end",
        "end_reason",
        *flags,
    ).from_(with_followup.subquery("f"))


# Optional earlier stages the eligibility table joins when the plan has them, with their alias.
_OPTIONAL_JOINS = (
    (names.WINDOW_COUNTS, "w"),
    (names.LAST_CONTACT, "lc"),
    (names.CONTACT_AT_INDEX, "ci"),
)


def _joined(base: exp.Select, stage: str, alias: str, *, left: bool = True) -> exp.Select:
    """``base`` joined to ``stage AS alias`` on the index patient (``i.patient_id``)."""
    on = exp.column("patient_id", alias).eq(exp.column("patient_id", "i"))
    return base.join(exp.to_table(stage).as_(alias), on=on, join_type="left" if left else None)


def _contact_columns(ctx: CompileContext, read: set[str]) -> list[exp.Expression]:
    columns: list[exp.Expression] = []
    if names.LAST_CONTACT in read:
        columns.append(exp.column("last_contact", "lc"))
    if names.CONTACT_AT_INDEX in read:
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


def _steps(ctx: CompileContext) -> tuple[list[tuple[exp.Expression, str]], list[str]]:
    """Each eligibility step's predicate and text, and its name in the attrition log."""
    study = ctx.study
    steps = [_step(ctx, i, c) for i, c in enumerate(ctx.eligibility, start=1)]
    step_names = [_step_name(c) for c in ctx.eligibility]
    if eligibility_with_default(study)[1]:
        predicate, text = steps[0]
        steps[0] = (predicate, f"{text} ({DEFAULT_STEP_TEXT})")
    # A new user's steps come first: they finish choosing the index (``_exposure``).
    new_user = exposure_steps(study)
    steps = [(predicate, text) for _, predicate, text in new_user] + steps
    step_names = [name for name, _, _ in new_user] + step_names
    if study.followup.incomplete == "exclude":
        steps.append(_complete_followup())
        step_names.append("complete_followup")
    return steps, step_names


def index_pass(draft: Draft) -> Draft:
    """``index_dates``: the source population and each patient's index date."""
    return draft.add(index_stage(draft.ctx))


def lookback_pass(draft: Draft) -> Draft:
    """Rule and onset stages of outcomes whose prevalence looks back a limited time."""
    return draft.add(*lookback_stages(draft.ctx))


def contact_pass(draft: Draft) -> Draft:
    """What counts as contact, from the tables earlier passes made usable."""
    ctx = draft.ctx
    present = [judged_stage(t) for t in coded_tables(ctx) if draft.has(judged_stage(t))]
    present += [names.MEASUREMENTS_JUDGED] if draft.has(names.MEASUREMENTS_JUDGED) else []
    return draft.add(*contact_stages(ctx.study, ctx.eligibility, tuple(present)))


def baseline_pass(draft: Draft) -> Draft:
    """Counts and measurement covariates in windows around the index date."""
    return draft.add(window_counts_stage(draft.ctx), measure_covariates_stage(draft.ctx))


def eligibility_pass(draft: Draft) -> Draft:
    """``eligibility``: the source population with follow-up and one column per step."""
    ctx = draft.ctx
    steps, _ = _steps(ctx)
    optional = (
        names.WINDOW_COUNTS,
        names.LAST_CONTACT,
        names.CONTACT_AT_INDEX,
    )
    read = {name for name in optional if draft.has(name)}
    return draft.add(
        Stage(
            names.ELIGIBILITY,
            _eligibility_query(ctx, [predicate for predicate, _ in steps], read),
            "the source population with follow-up and one pass/fail column per eligibility step",
        )
    )


def attrition_pass(draft: Draft) -> Draft:
    """``attrition`` (patients removed at each step) and ``population`` (who left where)."""
    steps, step_names = _steps(draft.ctx)
    index_text = draft.stage(names.INDEX_DATES).description.removeprefix("index: ")
    excluded_at = exp.Case()
    for i, name in enumerate(step_names, start=1):
        excluded_at = excluded_at.when(exp.not_(exp.column(step_column(i))), value(name))
    population = (
        exp.select("patient_id", "index_date", excluded_at.as_("excluded_at"))
        if step_names
        else exp.select(
            "patient_id", "index_date", exp.cast(exp.null(), "VARCHAR").as_("excluded_at")
        )
    )
    return draft.add(
        Stage(
            names.ATTRITION,
            attrition_query(
                [(name, text) for name, (_, text) in zip(step_names, steps, strict=True)],
                index_text=index_text,
            ),
            "patients in the extract, without an index date, and at each eligibility step",
        ),
        Stage(
            names.POPULATION,
            population.from_(names.ELIGIBILITY),
            "the source population with the first eligibility step each patient failed",
        ),
    )


def cohort_pass(draft: Draft) -> Draft:
    """``cohort``, the analysis table, and the check that no follow-up is negative."""
    ctx = draft.ctx
    steps, _ = _steps(ctx)
    joined = [n for n in (names.WINDOW_COUNTS, names.MEASURE_COVARIATES) if draft.has(n)]
    return draft.add(
        Stage(
            names.COHORT,
            _cohort_query(
                ctx,
                len(steps),
                has_windows=names.WINDOW_COUNTS in joined,
                has_measures=names.MEASURE_COVARIATES in joined,
            ),
            "the analysis table: one row per eligible patient",
        ),
        negative_followup_check(),
    )


# From the source population to the analysis table, in the order the stages are needed.
COHORT_PASSES: tuple[Pass, ...] = (
    index_pass,
    lookback_pass,
    contact_pass,
    baseline_pass,
    eligibility_pass,
    attrition_pass,
    cohort_pass,
)


def _cohort_query(
    ctx: CompileContext, n_steps: int, *, has_windows: bool, has_measures: bool
) -> exp.Query:
    column = exp.column
    query = exp.select(
        column("patient_id", "f"),
        column("index_date", "f"),
        exp.cast(column("age_at_index", "f"), "INT").as_("age_at_index"),
        column("sex", "f"),
        *((column(names.EXPOSURE, "f"),) if ctx.study.exposure else ()),
        *(c for name, cov in ctx.study.covariates.items() for c in covariate_column(name, cov)),
        *(
            c
            for outcome in ctx.outcomes
            for c in outcome_expressions(
                outcome.condition,
                cleared=ctx.study.outcomes.clear_before_for(outcome.condition) is not None,
            )
        ),
        column("followup_end", "f"),
        exp.cast(days_between(column("index_date", "f"), column("followup_end", "f")), "INT").as_(
            "followup_days"
        ),
        column("end_reason", "f"),
    ).from_(exp.to_table(names.ELIGIBILITY).as_("f"))
    joins = ((has_windows, names.WINDOW_COUNTS, "w"), (has_measures, names.MEASURE_COVARIATES, "m"))
    for wanted, stage, alias in joins:
        if wanted:
            on = exp.column("patient_id", alias).eq(exp.column("patient_id", "f"))
            query = query.join(exp.to_table(stage).as_(alias), on=on, join_type="left")
    if n_steps:
        steps = (column(step_column(i), "f") for i in range(1, n_steps + 1))
        query = query.where(exp.and_(*steps))
    return query
