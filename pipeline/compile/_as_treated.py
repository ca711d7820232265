"""As-treated follow-up of a new-user study (``exposure: {as_treated: true}``).

Intention to treat follows every patient from index to the usual end (the cohort's own
columns). As treated, follow-up also ends when the patient stops or changes treatment:

- ``discontinued``: the end of the first episode of the group started at index (it starts on
  the index date) plus ``grace_days``: a patient who refills within the grace period is still
  treated;
- ``other_group``: the date of the first record of another exposure group after index (a
  switch or an add-on; two groups on the index day are not in the cohort).

The end is the earliest of the three; on a tie the usual reason is given, then
``discontinued``, then ``other_group``. Each outcome gets ``incident_X_as_treated``,
``time_X_as_treated`` and ``event_X_as_treated``, read as the cohort's own columns are but up
to ``followup_end_as_treated``. The stage adds these columns to the cohort and becomes the
plan's ``cohort`` output; later stages (person-time, matching) keep reading ``cohort``.
"""

from __future__ import annotations

import datetime as dt

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._context import CompileContext
from pipeline.compile._dictionary import dictionary
from pipeline.compile._plan import ColumnDoc, Stage
from pipeline.compile._sql import add_days, days_between, value
from pipeline.compile.names import AS_TREATED_SUFFIX, outcome_columns

_FAR = dt.date(9999, 12, 31)


def _suffixed(column: str) -> str:
    return f"{column}{AS_TREATED_SUFFIX}"


def wanted(ctx: CompileContext) -> bool:
    """Whether the study asks for as-treated follow-up."""
    return ctx.study.exposure is not None and ctx.study.exposure.as_treated


def _ends(grace: int) -> exp.Query:
    """Each cohort patient with the discontinuation and other-group dates (NULL when none)."""
    column = exp.column
    first = (
        exp.select(column("patient_id", "e"), column("episode_end", "e"))
        .from_(exp.to_table(names.EPISODES).as_("e"))
        .join(
            exp.to_table(names.COHORT).as_("k"),
            on=exp.and_(
                column("patient_id", "k").eq(column("patient_id", "e")),
                column(names.EXPOSURE, "k").eq(column(names.EXPOSURE, "e")),
                column("episode_number", "e").eq(1),
            ),
        )
    )
    other = (
        exp.select(
            column("patient_id", "e"), exp.func("MIN", column("episode_start", "e")).as_("other")
        )
        .from_(exp.to_table(names.EPISODES).as_("e"))
        .join(
            exp.to_table(names.COHORT).as_("k"),
            on=exp.and_(
                column("patient_id", "k").eq(column("patient_id", "e")),
                column(names.EXPOSURE, "k").neq(column(names.EXPOSURE, "e")),
            ),
        )
        .group_by(column("patient_id", "e"))
    )
    return (
        exp.select(
            exp.column(exp.Star(), "c"),
            add_days(column("episode_end", "d"), grace).as_("discontinued_on"),
            column("other", "o").as_("other_group_on"),
        )
        .from_(exp.to_table(names.COHORT).as_("c"))
        .join(
            first.subquery("d"),
            on=column("patient_id", "d").eq(column("patient_id", "c")),
            join_type="left",
        )
        .join(
            other.subquery("o"),
            on=column("patient_id", "o").eq(column("patient_id", "c")),
            join_type="left",
        )
    )


def _outcome(name: str) -> list[exp.Expression]:
    named = outcome_columns(name)
    column = exp.column
    onset, index, at_risk = column(named.onset), column("index_date"), column(named.at_risk)
    end = column(_suffixed("followup_end"))
    incident = exp.and_(at_risk.copy(), onset > index, onset.copy() <= end)
    ended_at_death = column(_suffixed("end_reason")).eq(value("death"))
    time = (
        exp.Case()
        .when(incident.copy(), days_between(index.copy(), onset.copy()))
        .when(at_risk.copy(), days_between(index.copy(), end.copy()))
    )
    event = (
        exp.Case()
        .when(incident.copy(), exp.Literal.number(1))
        .when(exp.and_(at_risk.copy(), ended_at_death), exp.Literal.number(2))
        .when(at_risk.copy(), exp.Literal.number(0))
    )
    return [
        exp.Case()
        .when(at_risk.copy(), exp.func("COALESCE", incident, exp.false()))
        .as_(_suffixed(named.incident)),
        exp.cast(time, "INT").as_(_suffixed(named.time)),
        exp.cast(event, "INT").as_(_suffixed(named.event)),
    ]


def as_treated_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """``cohort_as_treated``: the cohort with its as-treated columns (none unless asked)."""
    exposure = ctx.study.exposure
    if not wanted(ctx) or exposure is None or exposure.episodes is None:
        return ()
    column = exp.column
    candidates = (
        column("followup_end"),
        exp.func("COALESCE", column("discontinued_on"), value(_FAR)),
        exp.func("COALESCE", column("other_group_on"), value(_FAR)),
    )
    end = column(_suffixed("followup_end"))
    reason = (
        exp.Case()
        .when(column("followup_end").eq(end), column("end_reason"))
        .when(column("discontinued_on").eq(end.copy()), value("discontinued"))
        .else_(value("other_group"))
    )
    with_end = exp.select(
        exp.Star(), exp.func("LEAST", *candidates).as_(_suffixed("followup_end"))
    ).from_(_ends(exposure.episodes.grace_days).subquery("x"))
    with_reason = exp.select(
        exp.Star(),
        exp.cast(days_between(column("index_date"), end.copy()), "INT").as_(
            _suffixed("followup_days")
        ),
        reason.as_(_suffixed("end_reason")),
    ).from_(with_end.subquery("y"))
    cohort_columns = [doc.column for doc in dictionary(ctx)]
    final = exp.select(
        *cohort_columns,
        _suffixed("followup_end"),
        _suffixed("followup_days"),
        _suffixed("end_reason"),
        *(c for o in ctx.outcomes for c in _outcome(o.condition)),
    ).from_(with_reason.subquery("z"))
    return (
        Stage(
            names.COHORT_AS_TREATED,
            final,
            "the analysis table with as-treated follow-up (ends also at discontinuation or "
            "another group)",
        ),
    )


def as_treated_docs(ctx: CompileContext) -> tuple[ColumnDoc, ...]:
    """The dictionary rows of the as-treated columns, after the cohort's own."""
    exposure = ctx.study.exposure
    if not wanted(ctx) or exposure is None or exposure.episodes is None:
        return ()
    grace = exposure.episodes.grace_days
    source = "patients, encounters, prescriptions"
    docs = [
        ColumnDoc(
            _suffixed("followup_end"),
            "DATE",
            "",
            "the last day of follow-up as treated",
            f"earliest of followup_end, the end of the first episode of the group started at "
            f"index plus {grace} days (grace), and the first record of another exposure group",
            source,
        ),
        ColumnDoc(
            _suffixed("followup_days"),
            "INTEGER",
            "days",
            "length of follow-up as treated",
            "followup_end_as_treated - index_date",
            source,
        ),
        ColumnDoc(
            _suffixed("end_reason"),
            "VARCHAR",
            "",
            "why follow-up as treated ended",
            "end_reason when followup_end is the earliest, else discontinued, else "
            "other_group (a switch or an add-on); on a tie in that order",
            source,
        ),
    ]
    for outcome in ctx.outcomes:
        named = outcome_columns(outcome.condition)
        docs += [
            ColumnDoc(
                _suffixed(named.incident),
                "BOOLEAN",
                "",
                f"{outcome.condition} with onset after index, up to followup_end_as_treated",
                f"as {named.incident}, with followup_end_as_treated; empty when not at risk",
                source,
            ),
            ColumnDoc(
                _suffixed(named.time),
                "INTEGER",
                "days",
                f"days from index to the onset of {outcome.condition} when incident as treated, "
                "else to followup_end_as_treated",
                "empty when not at risk",
                source,
            ),
            ColumnDoc(
                _suffixed(named.event),
                "INTEGER",
                "",
                "1 the outcome, 2 follow-up as treated ended at death without it, 0 censored",
                "empty when not at risk",
                source,
            ),
        ]
    return tuple(docs)
