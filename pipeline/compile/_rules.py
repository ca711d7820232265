"""Stages that find the date each rule is first met, and each condition's onset.

A rule is met on the earliest date ``t`` such that the evidence it needs has all occurred in the
window ``[t - within_days, t]``; the onset is the minimum over qualifying sets of the latest
date in the set. One window function per evidence computes this for every patient at once.
With ``apart_at_least_days`` (two events) the frame becomes ``[t - within, t - apart]``.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.compile._context import CompileContext, evidence_key
from pipeline.compile._plan import Stage
from pipeline.compile._sql import expression, query
from pipeline.config import Condition, Rule

_WITHIN = "RANGE BETWEEN :within PRECEDING AND CURRENT ROW"
_UNBOUNDED = "RANGE BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW"
_APART_WITHIN = "RANGE BETWEEN :within PRECEDING AND :apart PRECEDING"
_APART = "RANGE BETWEEN UNBOUNDED PRECEDING AND :apart PRECEDING"

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

_FIRST_EVIDENCE = """
SELECT e.patient_id, :condition AS condition, MIN(e.event_date) AS onset_date
FROM evidence_events AS e
JOIN (SELECT DISTINCT patient_id FROM rule_onsets WHERE condition = :condition) AS m
  ON m.patient_id = e.patient_id
WHERE :keys
GROUP BY e.patient_id
"""


def _frame(rule: Rule) -> tuple[str, dict[str, int]]:
    if rule.apart_at_least_days is not None:
        if rule.within_days is None:
            return _APART, {"apart": rule.apart_at_least_days}
        return _APART_WITHIN, {"apart": rule.apart_at_least_days, "within": rule.within_days}
    if rule.within_days is None:
        return _UNBOUNDED, {}
    return _WITHIN, {"within": rule.within_days}


def rule_query(condition: Condition, rule: Rule) -> exp.Query:
    """The query giving, per patient, the first date on which ``rule`` is met."""
    names = sorted(rule.need)
    keys = [evidence_key(condition.condition, n) for n in names]
    frame, bounds = _frame(rule)
    weight = exp.Literal.number(1) if rule.distinct_days else exp.column("n_rows")
    counts = [
        expression(_COUNT_IN_FRAME.format(frame=frame), key=key, weight=weight, **bounds).as_(
            f"in_frame_{i}"
        )
        for i, key in enumerate(keys)
    ]
    counted = (
        exp.select("patient_id", "evidence", "event_date", *counts)
        .from_("evidence_events")
        .where(exp.column("evidence").isin(*(exp.convert(k) for k in keys)))
    )
    if rule.apart_at_least_days is not None:
        # Exactly two events: the current row is one, the frame must hold the other.
        if len(keys) == 1:
            # With apart 0 the frame holds the current row itself: another event is needed.
            others = 2 if rule.apart_at_least_days == 0 else 1
            met = exp.and_(exp.column("evidence").eq(keys[0]), exp.column("in_frame_0") >= others)
        else:
            met = exp.or_(
                exp.and_(exp.column("evidence").eq(keys[0]), exp.column("in_frame_1") >= 1),
                exp.and_(exp.column("evidence").eq(keys[1]), exp.column("in_frame_0") >= 1),
            )
    else:
        met = exp.and_(
            *(exp.column(f"in_frame_{i}") >= rule.need[name] for i, name in enumerate(names))
        )
    return query(
        _RULE_MET,
        condition=condition.condition,
        rule=rule.name,
        counted=counted.subquery("counted"),
        met=met,
    )


def rule_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """``rule_onsets`` (one row per patient, condition and rule met) and ``condition_onsets``."""
    parts = [rule_query(c, r) for c in ctx.conditions for r in c.rules]
    stages = [
        Stage(
            "rule_onsets",
            _union_all(parts),
            ("evidence_events",),
            "the first date each rule of each condition is met, per patient",
        )
    ]
    first_evidence = [c.condition for c in ctx.conditions if c.onset == "first_evidence"]
    rule_met = [c.condition for c in ctx.conditions if c.onset == "rule_met"]
    onset_rows: list[exp.Query] = []
    if rule_met:
        onset_rows.append(
            exp.select("patient_id", "condition", "onset_date")
            .from_("rule_onsets")
            .where(exp.column("condition").isin(*(exp.convert(c) for c in rule_met)))
        )
    for c in ctx.conditions:
        if c.onset == "first_evidence":
            onset_rows.append(
                query(
                    _FIRST_EVIDENCE,
                    condition=c.condition,
                    keys=exp.column("evidence", "e").isin(
                        *(exp.convert(evidence_key(c.condition, n)) for n in sorted(c.evidence))
                    ),
                )
            )
    onsets = [
        exp.Min(
            this=exp.Case().when(exp.column("condition").eq(c.condition), exp.column("onset_date"))
        ).as_(f"onset_{c.condition}")
        for c in ctx.conditions
    ]
    stages.append(
        Stage(
            "condition_onsets",
            exp.select("patient_id", *onsets)
            .from_(_union_all(onset_rows).subquery("onsets"))
            .group_by("patient_id"),
            ("rule_onsets", "evidence_events") if first_evidence else ("rule_onsets",),
            "each condition's onset per patient (rule met, or first evidence once a rule is met)",
        )
    )
    return tuple(stages)


def _union_all(parts: list[exp.Query]) -> exp.Query:
    union = parts[0]
    for part in parts[1:]:
        union = union.union(part, distinct=False)
    return union
