"""The data dictionary of the analysis table, written from the same study the plan comes from.

Every column gets its type, unit, a one-sentence meaning, how it was computed, and the
definitions it comes from, so the table describes itself.
"""

from __future__ import annotations

from pipeline.codes import CHARLSON_CATEGORIES, WEIGHTS
from pipeline.compile import names
from pipeline.compile._context import CompileContext
from pipeline.compile._exposure import exposure_doc
from pipeline.compile._index import index_description
from pipeline.compile._plan import ColumnDoc
from pipeline.config import Covariate, Window
from pipeline.config._explain_study import counted_records
from pipeline.measures import DERIVED_FROM, MeasureRegistry


def _days_before(days: int) -> str:
    return f"{days} day{'' if days == 1 else 's'} before index"


def _window(window: Window) -> str:
    start, end = window
    first = "all history" if start is None else _days_before(-start)
    last = "the index date" if end == 0 else _days_before(-end)
    return f"from {first} to {last}, both included"


def _measure_docs(name: str, covariate: Covariate, registry: MeasureRegistry) -> list[ColumnDoc]:
    measure = covariate.latest or covariate.mean or covariate.minimum or covariate.maximum
    assert measure is not None  # only called for measure covariates
    unit = registry[measure].canonical_unit
    how = f"{covariate.kind} exact value (no < or >) {_window(covariate.span)}; 6 decimals"
    if measure in DERIVED_FROM:
        how += (
            f"; reported values, and on days without one, values derived from "
            f"{' and '.join(DERIVED_FROM[measure])}"
        )
    if covariate.latest:
        how += "; several values on the latest day are averaged"
        docs = [
            ColumnDoc(name, "DOUBLE", unit, f"latest {measure} before index", how, "measurements"),
            ColumnDoc(f"{name}_date", "DATE", "", f"date of {name}", how, "measurements"),
        ]
        if measure in DERIVED_FROM:
            meaning = f"whether {name} was derived, not reported"
            docs.append(ColumnDoc(f"{name}_derived", "BOOLEAN", "", meaning, how, "measurements"))
        return docs
    return [ColumnDoc(name, "DOUBLE", unit, f"{covariate.kind} of {measure}", how, "measurements")]


def _charlson_doc(name: str, covariate: Covariate) -> ColumnDoc:
    assert covariate.charlson is not None  # only called for the charlson kind
    weights = covariate.charlson.weights
    stated = ", ".join(f"{c.title} {WEIGHTS[weights][c.name]}" for c in CHARLSON_CATEGORIES)
    source = "Charlson et al. 1987" if weights == "charlson_1987" else "Quan et al. 2011"
    systems = covariate.charlson.codes
    deviations = "; ".join(
        f"{c.title} without {', '.join(code for system in systems for code in c.codes(system)[1])}"
        for c in CHARLSON_CATEGORIES
        if any(c.codes(system)[1] for system in systems)
    )
    return ColumnDoc(
        name,
        "INTEGER",
        "points",
        "Charlson comorbidity index over all history up to and including the index date",
        f"categories by the Quan et al. 2005 coding algorithms "
        f"({', '.join(systems)} codes), with our deviation from it: {deviations} "
        "(chronic kidney disease stages 1-2 do not score as renal disease); "
        f"weights ({source}): {stated}; "
        "a milder category does not count when its severe form is present "
        "(liver disease, diabetes, malignancy vs metastatic tumour)",
        "diagnoses",
    )


def _covariate_docs(ctx: CompileContext, name: str, covariate: Covariate) -> list[ColumnDoc]:
    kind = covariate.kind
    if kind == "condition":
        title = ctx.catalog.get(covariate.condition or "").title
        return [
            ColumnDoc(
                name,
                "BOOLEAN",
                "",
                f"{title} on or before the index date",
                f"onset of {covariate.condition} <= index_date (all history)",
                _definition_source(ctx, covariate.condition or ""),
            )
        ]
    if kind == "count":
        return [
            ColumnDoc(
                name,
                "INTEGER",
                "rows",
                f"number of {counted_records(covariate)} (0 when none)",
                f"records of the listed evidence {_window(covariate.span)}",
                "extract",
            )
        ]
    if kind == "days_since_first_evidence":
        condition = covariate.days_since_first_evidence or ""
        return [
            ColumnDoc(
                name,
                "INTEGER",
                "days",
                f"days from the first evidence of {condition} to index",
                "index_date - earliest evidence date on or before index; empty when none",
                _definition_source(ctx, condition),
            )
        ]
    if kind == "charlson":
        return [_charlson_doc(name, covariate)]
    return _measure_docs(name, covariate, ctx.registry)


def _definition_source(ctx: CompileContext, condition: str) -> str:
    path = ctx.catalog.files.get(condition)
    return f"definitions/conditions/{path.name}" if path else condition


def _outcome_docs(ctx: CompileContext, name: str) -> list[ColumnDoc]:
    condition = ctx.catalog.get(name)
    title = condition.title
    source = _definition_source(ctx, name)
    c = names.outcome_columns(name)
    at_risk = f"not {c.prevalent}"
    clear = ctx.study.outcomes.clear_before_for(name)
    if clear is not None:
        at_risk += (
            f", and no evidence that a rule of {name} needs dated from {clear} days before "
            "index to the index date (clear_before, a design choice of this study: such a "
            "patient may be a prevalent case recorded late)"
        )
    onset = ""
    if condition.onset == "first_evidence":
        onset = (
            "the earliest evidence of the events that first met a rule (the sets of events "
            "whose latest date is the first date any rule is met; when several sets meet a "
            "rule that day, the earliest evidence of all of them), "
        )
    at_risk_event = f"{c.at_risk} and " if clear is not None else ""
    return [
        ColumnDoc(
            c.prevalent,
            "BOOLEAN",
            "",
            f"{title} on or before the index date",
            f"{c.onset} <= index_date",
            source,
        ),
        ColumnDoc(
            c.at_risk,
            "BOOLEAN",
            "",
            f"at risk of {title} at index",
            at_risk,
            source,
        ),
        ColumnDoc(
            c.incident,
            "BOOLEAN",
            "",
            f"{title} developed during follow-up",
            f"{at_risk_event}index_date < {c.onset} <= followup_end; empty when not at risk",
            source,
        ),
        ColumnDoc(
            c.onset,
            "DATE",
            "",
            f"date a rule for {title} was first met"
            if condition.onset == "rule_met"
            else f"date of the first evidence of {title} that met a rule",
            f"{onset}using all evidence up to the end of data; filled also when prevalent or after "
            "follow-up",
            source,
        ),
        ColumnDoc(
            c.days_to,
            "INTEGER",
            "days",
            f"days from index to {title}",
            f"{c.onset} - index_date when incident, else empty",
            source,
        ),
        ColumnDoc(
            c.time,
            "INTEGER",
            "days",
            f"time at risk of {title}, for survival analysis (person-years: days / 365.25)",
            f"when {c.incident}: {c.onset} - index_date (= {c.days_to}); otherwise "
            f"followup_end - index_date (= followup_days); empty when not at risk",
            source,
        ),
        ColumnDoc(
            c.event,
            "INTEGER",
            "",
            f"how {c.time} ends: 1 {title}, 2 death first (a competing event), 0 censored",
            f"1 when {c.incident} (an onset on the day of death counts: 1); otherwise 2 when "
            "end_reason is death; otherwise 0 (follow-up ended for another reason); empty when "
            "not at risk",
            source,
        ),
    ]


def dictionary(ctx: CompileContext) -> tuple[ColumnDoc, ...]:
    """Every column of the analysis table, in table order."""
    study = ctx.study
    horizon = (
        f"{study.outcomes.horizon_days} days"
        if study.outcomes.horizon_days is not None
        else f"{study.outcomes.horizon_years} years"
    )
    reasons = ", ".join(study.followup.end_at)
    lost = ""
    if study.followup.lost_contact_after_days is not None:
        contact = (
            "the last usable encounter"
            if study.followup.contact == "encounters"
            else "the last usable dated row of encounters, diagnoses, prescriptions or "
            "measurements (contact: any_activity)"
        )
        lost = f"; lost_contact: {study.followup.lost_contact_after_days} days after {contact}"
    docs = [
        ColumnDoc(
            "patient_id",
            "as in the extract",
            "",
            "the patient's identifier",
            "as in the extract's patients table",
            "patients",
        ),
        ColumnDoc(
            "index_date",
            "DATE",
            "",
            "the patient's index (baseline) date",
            index_description(ctx),
            "encounters",
        ),
        ColumnDoc(
            "age_at_index",
            "INTEGER",
            "years",
            "age in completed years at index",
            "birthdays count on the day; 29 February births turn a year older on 1 March "
            "in non-leap years; birth year only: born 1 July",
            "patients",
        ),
        ColumnDoc("sex", "VARCHAR", "", "sex as recorded", "trimmed and upper-cased", "patients"),
    ]
    if study.exposure is not None:
        docs.append(exposure_doc(study))
    for name, covariate in study.covariates.items():
        docs += _covariate_docs(ctx, name, covariate)
    for outcome in ctx.outcomes:
        docs += _outcome_docs(ctx, outcome.condition)
    docs += [
        ColumnDoc(
            "followup_end",
            "DATE",
            "",
            "the last day of follow-up",
            f"earliest of: {reasons} (horizon {horizon} after index){lost}",
            "patients, encounters",
        ),
        ColumnDoc(
            "followup_days",
            "INTEGER",
            "days",
            "length of follow-up",
            "followup_end - index_date",
            "patients, encounters",
        ),
        ColumnDoc(
            "end_reason",
            "VARCHAR",
            "",
            "why follow-up ended",
            f"one of {reasons}; on a tie the first in that order",
            "patients, encounters",
        ),
    ]
    return tuple(docs)
