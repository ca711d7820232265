"""The columns of each outcome in the analysis table, and who is at risk of it.

A patient is at risk of an outcome when it is not prevalent at index and, with the outcome's
``clear_before: N`` (a design choice of the study), when none of the evidence its rules need is
dated from N days before index to the index date: one code months before index and another
after it then reads as a prevalent case that surfaced late, not as an incident one.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.compile._context import CompileContext
from pipeline.compile._sql import days_between, value
from pipeline.compile.names import clear_evidence_column, outcome_columns, prevalent_column


def at_risk(ctx: CompileContext, name: str) -> exp.Expression:
    """Not prevalent, and with ``clear_before`` no evidence of the outcome in that window."""
    at_risk: exp.Expression = exp.not_(exp.column(prevalent_column(name)))
    if ctx.study.outcomes.clear_before_for(name) is not None:
        at_risk = exp.and_(at_risk, exp.column(clear_evidence_column(name)).eq(0))
    return at_risk


def cleared_outcomes(ctx: CompileContext) -> list[str]:
    """Outcomes with a ``clear_before`` window."""
    return [
        o.condition
        for o in ctx.outcomes
        if ctx.study.outcomes.clear_before_for(o.condition) is not None
    ]


def outcome_expressions(name: str, *, cleared: bool) -> list[exp.Expression]:
    """The outcome's columns; with ``cleared`` evidence before index also makes it not at risk."""
    named = outcome_columns(name)
    onset = exp.column(named.onset, "f")
    prevalent = exp.column(named.prevalent, "f")
    at_risk: exp.Expression = exp.not_(prevalent.copy())
    if cleared:
        at_risk = exp.and_(at_risk, exp.column(clear_evidence_column(name), "f").eq(0))
    index = exp.column("index_date", "f")
    end = exp.column("followup_end", "f")
    incident = exp.func("COALESCE", exp.and_(onset > index, onset <= end.copy()), exp.false())
    is_incident = exp.and_(at_risk.copy(), incident.copy())
    # time_X and event_X: the outcome as a survival or competing-risks analysis reads it. Time
    # runs to the onset when incident, else to the end of follow-up; the event is 1 for the
    # outcome (an onset on the day of death is incident), 2 when follow-up ended at death
    # without it (the competing event), 0 when censored; both are empty when not at risk.
    time = (
        exp.Case()
        .when(is_incident.copy(), days_between(index.copy(), onset.copy()))
        .when(at_risk.copy(), days_between(index.copy(), end.copy()))
    )
    event = (
        exp.Case()
        .when(is_incident.copy(), exp.Literal.number(1))
        .when(
            exp.and_(at_risk.copy(), exp.column("end_reason", "f").eq(value("death"))),
            exp.Literal.number(2),
        )
        .when(at_risk.copy(), exp.Literal.number(0))
    )
    return [
        prevalent.as_(named.prevalent),
        at_risk.copy().as_(named.at_risk),
        exp.Case().when(at_risk.copy(), incident).as_(named.incident),
        onset.copy().as_(named.onset),
        exp.cast(
            exp.Case().when(is_incident.copy(), days_between(index.copy(), onset.copy())), "INT"
        ).as_(named.days_to),
        exp.cast(time, "INT").as_(named.time),
        exp.cast(event, "INT").as_(named.event),
    ]
