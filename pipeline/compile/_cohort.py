"""Stages from the source population to the analysis table: eligibility, attrition, follow-up.

Every eligibility step is one boolean column; the attrition log counts patients who pass all
steps before it and fail it, so each removed patient is counted exactly once, in order.
"""

from __future__ import annotations

import datetime as dt

from sqlglot import exp

from pipeline.compile._context import CompileContext
from pipeline.compile._plan import Stage
from pipeline.compile._sql import add_days, age_in_years, days_between, expression, query, value
from pipeline.config import Criterion

_SOURCE_POPULATION = """
SELECT
  s.patient_id,
  p.sex,
  p.birth_date,
  p.death_date,
  s.index_date,
  s.first_encounter,
  s.last_encounter,
  :age AS age_at_index
FROM encounter_summary AS s
JOIN patient_base AS p ON p.patient_id = s.patient_id
WHERE s.index_date IS NOT NULL
"""

_BASE_COLUMNS = (
    "patient_id",
    "sex",
    "birth_date",
    "death_date",
    "index_date",
    "first_encounter",
    "last_encounter",
    "age_at_index",
)


def _step_name(criterion: Criterion) -> str:
    names = {"history_days": "history", "at_risk_of_any_outcome": "at_risk_any_outcome"}
    return names.get(criterion.kind, criterion.kind)


def _step(ctx: CompileContext, criterion: Criterion) -> tuple[exp.Expression, str]:
    """The predicate of one eligibility step and its plain description."""
    if criterion.sex is not None:
        sexes = sorted(criterion.sex)
        return (
            exp.column("sex").isin(*(exp.convert(s) for s in sexes)),
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
            days_between(exp.column("first_encounter"), exp.column("index_date")) >= days,
            f"first encounter at least {days} days before index",
        )
    names = [c.condition for c in ctx.outcomes]
    return (
        exp.not_(exp.and_(*(exp.column(f"prevalent_{n}") for n in names))),
        f"at risk of at least one outcome (not prevalent for all of {', '.join(names)})",
    )


def _prevalent(name: str) -> exp.Expression:
    onset = exp.column(f"onset_{name}")
    return exp.func(
        "COALESCE",
        exp.and_(onset.is_(exp.null()).not_(), onset <= exp.column("index_date")),
        exp.false(),
    )


def cohort_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """Source population, eligibility flags, the attrition log and the analysis table."""
    study = ctx.study
    names = [c.condition for c in ctx.outcomes]
    onset_columns = [f"onset_{n}" for n in ctx.flagged]
    population = query(
        _SOURCE_POPULATION,
        age=age_in_years(birth=exp.column("birth_date", "p"), on=exp.column("index_date", "s")),
    )
    steps = [_step(ctx, c) for c in study.eligibility]
    flags = [
        exp.func("COALESCE", predicate, exp.false()).as_(f"step_{i}")
        for i, (predicate, _) in enumerate(steps, start=1)
    ]
    eligibility = (
        exp.select(
            *(exp.column(c, "s") for c in _BASE_COLUMNS),
            *(exp.column(c, "o") for c in onset_columns),
        )
        .from_(population.subquery("s"))
        .join("condition_onsets AS o", on="o.patient_id = s.patient_id", join_type="left")
    )
    with_prevalence = exp.select(
        *_BASE_COLUMNS,
        *onset_columns,
        *(_prevalent(n).as_(f"prevalent_{n}") for n in names),
    ).from_(eligibility.subquery("e"))
    flagged = exp.select(
        *_BASE_COLUMNS,
        *onset_columns,
        *(f"prevalent_{n}" for n in names),
        *flags,
    ).from_(with_prevalence.subquery("v"))
    stages = [
        Stage(
            "eligibility",
            flagged,
            ("encounter_summary", "patient_base", "condition_onsets"),
            "the source population with one pass/fail column per eligibility step",
        ),
        Stage(
            "attrition",
            _attrition_query(
                [
                    (_step_name(c), text)
                    for c, (_, text) in zip(study.eligibility, steps, strict=True)
                ],
                index_text=_index_text(ctx),
            ),
            ("eligibility",),
            "patients before, removed and remaining at each eligibility step",
        ),
        Stage(
            "cohort",
            _cohort_query(ctx, len(steps)),
            ("eligibility",),
            "the analysis table: one row per eligible patient",
        ),
    ]
    return tuple(stages)


def _index_text(ctx: CompileContext) -> str:
    start, end = ctx.study.index.first_encounter.between
    return f"first encounter between {start.isoformat()} and {end.isoformat()}"


def _attrition_query(steps: list[tuple[str, str]], *, index_text: str) -> exp.Query:
    counts = [exp.func("COUNT", exp.Star()).as_("n_0")]
    condition: exp.Expression = exp.column("step_1")
    for i in range(1, len(steps) + 1):
        if i > 1:
            condition = exp.and_(condition, exp.column(f"step_{i}"))
        counts.append(
            exp.func(
                "COALESCE",
                exp.Sum(
                    this=exp.Case()
                    .when(condition, exp.Literal.number(1))
                    .else_(exp.Literal.number(0))
                ),
                exp.Literal.number(0),
            ).as_(f"n_{i}")
        )
    totals = exp.select(*counts).from_("eligibility")
    rows = [
        exp.select(
            exp.Literal.number(0).as_("step_number"),
            value("source_population").as_("step"),
            value(index_text).as_("description"),
            exp.column("n_0").as_("patients_before"),
            exp.Literal.number(0).as_("removed"),
            exp.column("n_0").as_("remaining"),
        ).from_("totals")
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


def _followup_candidates(ctx: CompileContext) -> dict[str, exp.Expression]:
    study = ctx.study
    candidates = {
        "death": exp.column("death_date"),
        "end_of_data": value(study.end_of_data),
        "horizon": add_days(exp.column("index_date"), study.outcomes.horizon_days),
    }
    if study.followup.lost_contact_after_days is not None:
        candidates["lost_contact"] = add_days(
            exp.column("last_encounter"), study.followup.lost_contact_after_days
        )
    return {reason: candidates[reason] for reason in study.followup.end_at}


def _covariate_columns(ctx: CompileContext) -> list[exp.Expression]:
    columns: list[exp.Expression] = []
    for name, covariate in ctx.study.covariates.items():
        if covariate.condition is not None:
            columns.append(_prevalent(covariate.condition).as_(name))
    return columns


def _cohort_query(ctx: CompileContext, n_steps: int) -> exp.Query:
    names = [c.condition for c in ctx.outcomes]
    onset_columns = [f"onset_{n}" for n in ctx.flagged]
    candidates = _followup_candidates(ctx)
    far = value(dt.date(9999, 12, 31))
    followup_end = exp.func(
        "LEAST", *(exp.func("COALESCE", e.copy(), far.copy()) for e in candidates.values())
    )
    reason = exp.Case()
    for name, candidate in candidates.items():
        reason = reason.when(candidate.copy().eq(exp.column("followup_end")), value(name))
    inner = exp.select(
        *_BASE_COLUMNS,
        *onset_columns,
        *(f"prevalent_{n}" for n in names),
        followup_end.as_("followup_end"),
    ).from_("eligibility")
    if n_steps:
        inner = inner.where(exp.and_(*(exp.column(f"step_{i}") for i in range(1, n_steps + 1))))
    outcome_columns: list[exp.Expression] = []
    for n in names:
        onset = exp.column(f"onset_{n}")
        prevalent = exp.column(f"prevalent_{n}")
        incident = exp.func(
            "COALESCE",
            exp.and_(onset > exp.column("index_date"), onset <= exp.column("followup_end")),
            exp.false(),
        )
        outcome_columns += [
            prevalent.as_(f"prevalent_{n}"),
            exp.not_(prevalent).as_(f"at_risk_{n}"),
            exp.Case().when(prevalent, exp.null()).else_(incident).as_(f"incident_{n}"),
            onset.as_(f"onset_{n}"),
            exp.cast(
                exp.Case().when(
                    exp.and_(exp.not_(prevalent), incident),
                    days_between(exp.column("index_date"), onset),
                ),
                "INT",
            ).as_(f"days_to_{n}"),
        ]
    return exp.select(
        "patient_id",
        "index_date",
        exp.cast(exp.column("age_at_index"), "INT").as_("age_at_index"),
        "sex",
        *_covariate_columns(ctx),
        *outcome_columns,
        "followup_end",
        exp.cast(days_between(exp.column("index_date"), exp.column("followup_end")), "INT").as_(
            "followup_days"
        ),
        reason.as_("end_reason"),
    ).from_(inner.subquery("f"))
