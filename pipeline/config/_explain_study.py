"""``ascertain check --explain`` on a study: the design in plain sentences, without data.

A reviewer reading a study file has to know the meaning of every key; the paragraph written
here says the same in words, in the order a patient meets it (index, eligibility, outcomes,
horizon, follow-up end, covariates), in the wording :func:`explain_condition` uses for
definitions (evidence through the same phrases).
"""

from __future__ import annotations

from pipeline.config._check import _codes_text
from pipeline.config._exposure import exposure_text
from pipeline.config._matching import matching_text
from pipeline.config._study import Covariate, Criterion, IndexRule, Study, Window


def _and(items: list[str], word: str = "and") -> str:
    if len(items) <= 1:
        return "".join(items)
    return f"{', '.join(items[:-1])} {word} {items[-1]}"


def _day(offset: int) -> str:
    if offset == 0:
        return "the index date"
    days = "1 day" if abs(offset) == 1 else f"{abs(offset)} days"
    return f"{days} {'before' if offset < 0 else 'after'} index"


def _window(window: Window) -> str:
    start, end = window
    first = "the start of the record" if start is None else _day(start)
    return f"from {first} to {_day(end)}"


def _index_text(index: IndexRule) -> str:
    if index.fixed_date is not None:
        return f"{index.fixed_date} for every patient"
    if index.first_encounter is not None:
        start, end = index.first_encounter.between
        types = index.first_encounter.type
        kind = f" of type {_and(list(types), 'or')}" if types else ""
        return f"the first encounter{kind} between {start} and {end}"
    if index.first_event is not None:
        start, end = index.first_event.between
        event = index.first_event
        what = (
            f"the onset of {event.condition}"
            if event.condition is not None
            else _codes_text(event.evidence)  # type: ignore[arg-type]  # one of the two is set
        )
        return f"the first date of {what} between {start} and {end}"
    if index.exposure_start is not None:
        start, end = index.exposure_start.between
        return f"the first record of an exposure group between {start} and {end}"
    draw = index.random_encounter
    assert draw is not None  # the model requires exactly one strategy
    start, end = draw.between
    return (
        f"one encounter day between {start} and {end} drawn per patient "
        f"(seed {draw.seed}, so the draw repeats)"
    )


def _step_text(step: Criterion, outcomes: tuple[str, ...]) -> str:
    if step.sex is not None:
        return f"sex recorded as {_and(sorted(step.sex), 'or')}"
    if step.alive_at_index:
        return "alive at index (no death on or before the index date)"
    if step.age is not None:
        low, high = step.age.between
        return f"age at index between {low} and {high} years"
    if step.history_days is not None:
        return f"first encounter at least {step.history_days} days before index"
    if step.registered_days is not None:
        return f"registered at least {step.registered_days} days before index"
    if step.encounters is not None:
        rule = step.encounters
        return f"at least {rule.at_least} encounters {_window(rule.window)}"
    if step.practice is not None:
        return f"registered at practice {_and(sorted(step.practice), 'or')}"
    if step.not_prevalent is not None:
        return f"no {step.not_prevalent} on or before the index date"
    if step.no_evidence is not None:
        rule = step.no_evidence
        return f"without {_codes_text(rule.evidence)} {_window(rule.window)}"
    if step.in_contact_at_index is not None:
        window = _window(step.in_contact_at_index.window)
        return f"a contact {window}, and not deregistered before index"
    return f"at risk of at least one outcome (not prevalent for all of {', '.join(outcomes)})"


def counted_records(covariate: Covariate) -> str:
    """What a count covariate counts, with its window, in the words of ``check --explain``.

    The data dictionary states a count column's meaning with the same phrase, so a reader of
    Table 1 sees what is counted and when (not only "number of matching records"), and the
    two descriptions of one covariate cannot drift apart.
    """
    assert covariate.count is not None  # only called for the count kind
    return f"records of {_codes_text(covariate.count)} {_window(covariate.span)}"


def _covariate_text(name: str, covariate: Covariate) -> str:
    window = _window(covariate.span)
    if covariate.condition is not None:
        return f"{name} is whether {covariate.condition} has its onset on or before the index date"
    for kind, word in (
        ("latest", "the latest"),
        ("mean", "the mean"),
        ("minimum", "the lowest"),
        ("maximum", "the highest"),
    ):
        measure = getattr(covariate, kind)
        if measure is not None:
            return f"{name} is {word} value of {measure} {window}"
    if covariate.count is not None:
        return f"{name} is the number of {counted_records(covariate)}"
    if covariate.days_since_first_evidence is not None:
        return (
            f"{name} is the days from the first evidence of "
            f"{covariate.days_since_first_evidence} to the index date"
        )
    spec = covariate.charlson
    assert spec is not None  # the model requires exactly one kind
    weights = "Charlson 1987" if spec.weights == "charlson_1987" else "Quan 2011"
    return (
        f"{name} is the Charlson index {_window((None, 0))}, from the Quan 2005 "
        f"{_and(list(spec.codes), 'and')} codes with the {weights} weights"
    )


def _outcomes_text(study: Study) -> str:
    outcomes = study.outcomes
    horizon = (
        f"{outcomes.horizon_days} days"
        if outcomes.horizon_days is not None
        else f"{outcomes.horizon_years} years"
    )
    notes = []
    for name in outcomes.conditions:
        lookback = outcomes.lookback_for(name)
        if lookback is not None:
            notes.append(f" For {name} only evidence from {lookback} days before index on counts.")
        clear = outcomes.clear_before_for(name)
        if clear is not None:
            notes.append(
                f" A patient with any evidence a rule of {name} needs from {clear} days before "
                f"index to the index date is not at risk of {name}."
            )
    return (
        f"Outcomes, side by side: {_and(list(outcomes.conditions))}; each is prevalent when its "
        "onset is on or before the index date, and incident when its onset falls after the "
        f"index date and within the horizon of {horizon} after index.{''.join(notes)}"
    )


_END_TEXT = {
    "death": "death",
    "end_of_data": "the end of data",
    "deregistration": "deregistration",
    "horizon": "the horizon",
}


def _followup_text(study: Study) -> str:
    followup = study.followup
    ends = []
    for reason in followup.end_at:
        if reason == "lost_contact":
            contact = "encounter" if followup.contact == "encounters" else "dated row of any table"
            ends.append(
                f"loss of contact ({followup.lost_contact_after_days} days after the last "
                f"{contact})"
            )
        elif reason == "end_of_data":
            ends.append(f"the end of data ({study.end_of_data})")
        else:
            ends.append(_END_TEXT[reason])
    incomplete = (
        "censored"
        if followup.incomplete == "censor"
        else "removed (one more attrition step), unless it ended at death"
    )
    return (
        f"Follow-up ends at the first of {_and(ends, 'or')} (ties in that order); a patient "
        f"whose follow-up ends before the horizon is {incomplete}."
    )


def _persontime_text(study: Study) -> str:
    """What ``persontime:`` asks the build to write; empty when the study has none."""
    option = study.persontime
    if option is None:
        return ""
    splits = [f"age band ({_and([label for *_, label in option.age_labelled])})"]
    if option.calendar_year:
        splits.append("calendar year")
    if option.since_index_years:
        since = _and([label for *_, label in option.since_labelled])
        splits.append(f"whole years since index ({since})")
    return (
        f" Person-time: each patient's follow-up is split by {_and(splits)} into "
        "persontime.parquet, with each outcome's days at risk and events; the report's rates "
        "by age band come from it."
    )


def explain_study(study: Study) -> str:
    """One plain paragraph saying what a study design means, in the order a patient meets it.

    >>> from pipeline.config import Study
    >>> s = Study.model_validate({"study": "s", "title": "S", "extract": "x",
    ...     "end_of_data": "2019-12-31", "index": {"fixed_date": "2016-01-01"},
    ...     "eligibility": [{"alive_at_index": True}],
    ...     "outcomes": {"conditions": ["ckd"], "horizon_years": 2},
    ...     "followup": {"end_at": ["death", "horizon"]}, "output": {"folder": "out"}})
    >>> print(explain_study(s))
    S (s): Index: 2016-01-01 for every patient. Eligibility, in this order: 1. alive at index (no death on or before the index date). Outcomes, side by side: ckd; each is prevalent when its onset is on or before the index date, and incident when its onset falls after the index date and within the horizon of 2 years after index. Follow-up ends at the first of death or the horizon (ties in that order); a patient whose follow-up ends before the horizon is censored. Covariates: none.
    """  # noqa: E501
    outcomes = study.outcomes.conditions
    steps = "; ".join(
        f"{number}. {_step_text(step, outcomes)}"
        for number, step in enumerate(study.eligibility, start=1)
    )
    covariates = "; ".join(_covariate_text(n, c) for n, c in study.covariates.items())
    return (
        f"{study.title} ({study.study}): Index: {_index_text(study.index)}. "
        f"Eligibility, in this order: {steps or 'none'}. {_outcomes_text(study)} "
        f"{_followup_text(study)} Covariates: {covariates or 'none'}.{_persontime_text(study)}"
        f"{matching_text(study.matching) if study.matching else ''}"
        f"{exposure_text(study.exposure) if study.exposure else ''}"
    )
