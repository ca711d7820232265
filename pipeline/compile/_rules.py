"""Stages that find the date each rule is first met, and each condition's onset.

A rule is met on the earliest date ``t`` such that the evidence it needs has all occurred in the
window ``[t - within_days, t]``; the onset is the minimum over qualifying sets of the latest
date in the set. One window function per evidence computes this for every patient at once.
With ``apart_at_least_days`` (two events) the frame becomes ``[t - within, t - apart]``.
With ``absent_window: [s, e]`` one more window function counts the absent evidence in
``[t + s, t + e]`` around each candidate date, which must hold none; without it, a patient with
absent evidence on any date never meets the rule.

Conditions are evaluated one stage each, in reference order, so a condition used as evidence
(``condition: diabetes``) is finished before the conditions that read its onset.
"""

from __future__ import annotations

import datetime as dt

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._context import CompileContext, evidence_id, evidence_key
from pipeline.compile._plan import Stage
from pipeline.compile._sql import add_days, days_between, expression, query, value
from pipeline.config import Condition, Rule

_WITHIN = "RANGE BETWEEN :within PRECEDING AND CURRENT ROW"
_UNBOUNDED = "RANGE BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW"
_APART_WITHIN = "RANGE BETWEEN :within PRECEDING AND :apart PRECEDING"
_APART = "RANGE BETWEEN UNBOUNDED PRECEDING AND :apart PRECEDING"

# COUNT, not SUM: a frame can be empty (e.g. from 1 day after to 1 day after), and SUM over no
# rows is NULL where COUNT is 0.
_ABSENT_IN_FRAME = (
    "COUNT(CASE WHEN :absent THEN 1 END)"
    " OVER (PARTITION BY patient_id ORDER BY day RANGE BETWEEN {low} AND {high})"
)

_COUNT_IN_FRAME = (
    "SUM(CASE WHEN evidence = :key THEN :weight ELSE 0 END)"
    " OVER (PARTITION BY patient_id ORDER BY day {frame})"
)

_RULE_MET = """
SELECT patient_id, :condition AS condition, :rule AS rule, MIN(event_date) AS onset_date
FROM :counted
WHERE :met
GROUP BY patient_id
"""

# With ``onset: first_evidence`` each met row also carries the earliest evidence of the sets it
# completes; only the rows of the first met date count, so a later set never lends its evidence.
_RULE_MET_FIRST_EVIDENCE = """
SELECT
  patient_id, :condition AS condition, :rule AS rule, MIN(event_date) AS onset_date,
  MIN(set_start) AS first_evidence_date
FROM (
  SELECT patient_id, event_date, set_start,
    MIN(event_date) OVER (PARTITION BY patient_id) AS first_met
  FROM :counted
  WHERE :met
) AS met
WHERE event_date = first_met
GROUP BY patient_id
"""

_REFERENCED_ONSETS = """
SELECT patient_id, :key AS evidence, onset_date AS event_date, CAST(:day AS INT) AS day,
  1 AS n_rows
FROM :onsets
"""

_ONSET_RULE_MET = """
SELECT patient_id, MIN(onset_date) AS onset_date
FROM :rules
GROUP BY patient_id
"""

_ONSET_FIRST_EVIDENCE = """
SELECT patient_id, MIN(first_evidence_date) AS onset_date
FROM (
  SELECT patient_id, onset_date, first_evidence_date,
    MIN(onset_date) OVER (PARTITION BY patient_id) AS first_met
  FROM :rules
) AS r
WHERE onset_date = first_met
GROUP BY patient_id
"""

_FIRST_IN_FRAME = "MIN(event_date) OVER (PARTITION BY patient_id ORDER BY day {frame})"
_FIRST_OF_KEY_IN_FRAME = (
    "MIN(CASE WHEN evidence = :key THEN event_date END)"
    " OVER (PARTITION BY patient_id ORDER BY day {frame})"
)


def _frame(rule: Rule) -> tuple[str, dict[str, int]]:
    if rule.apart_at_least_days is not None:
        if rule.within_days is None:
            return _APART, {"apart": rule.apart_at_least_days}
        return _APART_WITHIN, {"apart": rule.apart_at_least_days, "within": rule.within_days}
    if rule.within_days is None:
        return _UNBOUNDED, {}
    return _WITHIN, {"within": rule.within_days}


def _absent_bound(offset: int | None, name: str, unbounded: str) -> tuple[str, dict[str, int]]:
    """One end of the absent window as a frame bound: days before or after the current row."""
    if offset is None:
        return f"UNBOUNDED {unbounded}", {}
    if offset == 0:
        return "CURRENT ROW", {}
    return f":{name} {'PRECEDING' if offset < 0 else 'FOLLOWING'}", {name: abs(offset)}


def _absent_in_frame(rule: Rule, keys: list[exp.Expression]) -> exp.Expression:
    """Absent evidence dated inside the rule's ``absent_window`` around each row's day."""
    assert rule.absent_window is not None  # only called for a bounded absent
    start, end = rule.absent_window
    low, low_bound = _absent_bound(start, "low", "PRECEDING")
    high, high_bound = _absent_bound(end, "high", "FOLLOWING")
    return expression(
        _ABSENT_IN_FRAME.format(low=low, high=high),
        absent=exp.column("evidence").isin(*keys),
        **low_bound,
        **high_bound,
    ).as_("absent_in_frame")


def _keys(condition: Condition, needed: list[str] | tuple[str, ...]) -> list[exp.Expression]:
    return [evidence_id(evidence_key(condition.condition, n)) for n in needed]


def rule_query(
    condition: Condition,
    rule: Rule,
    events: exp.Expression | None = None,
    *,
    first_evidence: bool = False,
) -> exp.Query:
    """The query giving, per patient, the first date on which ``rule`` is met.

    Args:
        condition: The condition the rule belongs to.
        rule: The rule.
        events: The relation of evidence events to read; ``evidence_events`` by default.
        first_evidence: Also give ``first_evidence_date``: the earliest event of any set of
            events that meets the rule on that first date. For a window rule that is the
            earliest needed event in the window ending that day (each of them belongs to such
            a set: a set without an event on that day would have met the rule earlier); for a
            two-event rule, the earliest partner that the day's events pair with.
    """
    source = events if events is not None else exp.to_table(names.EVIDENCE_EVENTS)
    wanted = sorted(rule.need)
    keys = _keys(condition, wanted)
    frame, bounds = _frame(rule)
    weight = exp.Literal.number(1) if rule.distinct_days else exp.column("n_rows")
    counts = [
        expression(_COUNT_IN_FRAME.format(frame=frame), key=key, weight=weight, **bounds).as_(
            f"in_frame_{i}"
        )
        for i, key in enumerate(keys)
    ]
    needed = exp.column("evidence").isin(*(k.copy() for k in keys))
    relevant: exp.Expression = needed
    met = _met(rule, wanted, keys)
    if rule.absent and rule.absent_window is None:
        absent = exp.select("patient_id").from_(source.copy())
        absent = absent.where(exp.column("evidence").isin(*_keys(condition, rule.absent)))
        relevant = exp.and_(relevant, exp.column("patient_id").isin(query=absent).not_())
    elif rule.absent:
        # Absent rows join the window functions; only needed rows can be the day it is met.
        absent_keys = _keys(condition, rule.absent)
        relevant = exp.or_(needed, exp.column("evidence").isin(*(k.copy() for k in absent_keys)))
        counts.append(_absent_in_frame(rule, absent_keys))
        met = exp.and_(needed.copy(), met, exp.column("absent_in_frame").eq(0))
    counted = (
        exp.select("patient_id", "evidence", "event_date", *counts).from_(source).where(relevant)
    )
    if first_evidence:
        counted = counted.select(_set_start(rule, keys, frame, bounds).as_("set_start"))
        return query(
            _RULE_MET_FIRST_EVIDENCE,
            condition=condition.condition,
            rule=rule.name,
            counted=counted.subquery("counted"),
            met=_met(rule, wanted, keys),
        )
    return query(
        _RULE_MET,
        condition=condition.condition,
        rule=rule.name,
        counted=counted.subquery("counted"),
        met=met,
    )


def _set_start(
    rule: Rule, keys: list[exp.Expression], frame: str, bounds: dict[str, int]
) -> exp.Expression:
    """The earliest evidence of the sets a met row completes (see :func:`rule_query`)."""
    if rule.apart_at_least_days is None:
        # Rows are already only the needed evidence: the earliest of any of them in the window.
        return expression(_FIRST_IN_FRAME.format(frame=frame), **bounds)
    firsts = [
        expression(_FIRST_OF_KEY_IN_FRAME.format(frame=frame), key=key.copy(), **bounds)
        for key in keys
    ]
    if len(keys) == 1:
        return firsts[0]
    # A row of one evidence pairs with the other evidence in its frame.
    return exp.Case().when(exp.column("evidence").eq(keys[0].copy()), firsts[1]).else_(firsts[0])


def _met(rule: Rule, needed: list[str], keys: list[str]) -> exp.Expression:
    if rule.apart_at_least_days is None:
        return exp.and_(
            *(exp.column(f"in_frame_{i}") >= rule.need[name] for i, name in enumerate(needed))
        )
    # Exactly two events: the current row is one, the frame must hold the other.
    if len(keys) == 1:
        # With apart 0 the frame holds the current row itself: another event is needed.
        others = 2 if rule.apart_at_least_days == 0 else 1
        return exp.and_(
            exp.column("evidence").eq(keys[0].copy()), exp.column("in_frame_0") >= others
        )
    return exp.or_(
        exp.and_(exp.column("evidence").eq(keys[0].copy()), exp.column("in_frame_1") >= 1),
        exp.and_(exp.column("evidence").eq(keys[1].copy()), exp.column("in_frame_0") >= 1),
    )


def _union_all(parts: list[exp.Query]) -> exp.Query:
    union = parts[0]
    for part in parts[1:]:
        union = union.union(part, distinct=False)
    return union


def _events_for(condition: Condition) -> exp.Expression:
    """The evidence events a condition reads, with its referenced conditions' onsets added."""
    own = (
        exp.select("patient_id", "evidence", "event_date", "day", "n_rows")
        .from_(names.EVIDENCE_EVENTS)
        .where(exp.column("evidence").isin(*_keys(condition, sorted(condition.evidence))))
    )
    parts: list[exp.Query] = [own]
    epoch = value(dt.date(1970, 1, 1))
    for name, ev in sorted(condition.evidence.items()):
        if ev.condition is not None:
            parts.append(
                query(
                    _REFERENCED_ONSETS,
                    key=evidence_id(evidence_key(condition.condition, name)),
                    day=days_between(epoch, exp.column("onset_date")),
                    onsets=exp.to_table(names.onset_stage(ev.condition)),
                )
            )
    if len(parts) == 1:
        return exp.to_table(names.EVIDENCE_EVENTS)
    return _union_all(parts).subquery(names.EVIDENCE_EVENTS)


def condition_stages(
    condition: Condition, *, lookback_days: int | None = None
) -> tuple[Stage, Stage]:
    """``rules_<c>``: each rule's first date per patient; ``onset_<c>``: the onset per patient.

    With ``lookback_days`` the stages are named ``rules_<c>_lookback`` and ``onset_<c>_lookback``
    and read only evidence dated on or after each patient's index date minus that many days.
    """
    name = condition.condition
    events = _events_for(condition)
    lookback = lookback_days is not None
    if lookback_days is not None:
        events = _since_lookback(events, lookback_days)
    first = condition.onset == "first_evidence"
    rules = Stage(
        names.rules_stage(name, lookback=lookback),
        _union_all(
            [rule_query(condition, r, events.copy(), first_evidence=first) for r in condition.rules]
        ),
        f"the first date each rule of {name} is met, per patient"
        + (f", from evidence since {lookback_days} days before index" if lookback else ""),
    )
    if condition.onset == "rule_met":
        onset_query = query(_ONSET_RULE_MET, rules=exp.to_table(rules.name))
        why = f"onset of {name}: the earliest date any of its rules is met"
    else:
        onset_query = query(_ONSET_FIRST_EVIDENCE, rules=exp.to_table(rules.name))
        why = (
            f"onset of {name}: the earliest evidence of the sets of events that first met a "
            "rule (on the first date any rule is met)"
        )
    return rules, Stage(names.onset_stage(name, lookback=lookback), onset_query, why)


def _since_lookback(events: exp.Expression, days: int) -> exp.Expression:
    source = (
        events if isinstance(events, exp.Subquery) else exp.select("*").from_(events).subquery()
    )
    start = add_days(exp.column("index_date", "i"), -days)
    recent = (
        exp.select(
            *(exp.column(c, "e") for c in ("patient_id", "evidence", "event_date", "day", "n_rows"))
        )
        .from_(source.as_("e"))
        .join(
            exp.to_table(names.INDEX_DATES).as_("i"),
            on=exp.and_(
                exp.column("patient_id", "i").eq(exp.column("patient_id", "e")),
                exp.column("event_date", "e") >= start,
            ),
        )
    )
    return recent.subquery(names.EVIDENCE_EVENTS)


def lookback_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """Rule and onset stages of outcomes whose prevalence looks back a limited time."""
    stages: list[Stage] = []
    for outcome in ctx.outcomes:
        days = ctx.study.outcomes.lookback_for(outcome.condition)
        if days is not None:
            stages.extend(condition_stages(outcome, lookback_days=days))
    return tuple(stages)


def rule_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """Per-condition rule and onset stages, then ``condition_onsets``: one column each."""
    stages = [stage for c in ctx.conditions for stage in condition_stages(c)]
    rows = [
        exp.select("patient_id", value(name).as_("condition"), "onset_date").from_(
            names.onset_stage(name)
        )
        for name in ctx.flagged
    ]
    onsets = [
        exp.Min(
            this=exp.Case().when(exp.column("condition").eq(name), exp.column("onset_date"))
        ).as_(names.onset_column(name))
        for name in ctx.flagged
    ]
    stages.append(
        Stage(
            names.CONDITION_ONSETS,
            exp.select("patient_id", *onsets)
            .from_(_union_all(rows).subquery("onsets"))
            .group_by("patient_id"),
            "each condition's onset per patient, one column per condition the table needs",
        )
    )
    return tuple(stages)
