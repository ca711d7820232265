"""Contact with the practice: what counts as contact, being in contact at index, and its loss.

Loss of contact (a follow-up end) and the ``in_contact_at_index`` eligibility step read the
same contacts: usable encounters (``followup.contact: encounters``, the default), or any row
of encounters and of whichever of diagnoses, prescriptions and measurements the study reads
whose row judgement finds no record or timing problem (``any_activity``), whatever its code or
value: a known patient, a readable date up to the end of data and death, and not set aside by
the extract's reader.

A fixed-date index can fall long after a patient's last contact; such a patient's follow-up
would end before it starts. So a fixed-date study that ends follow-up at loss of contact and
has no ``in_contact_at_index`` step of its own gets one, first, with the window the study's
own loss of contact implies: a contact within ``lost_contact_after_days`` before index, both
ends included. Whatever the steps, the ``followup_not_negative`` check fails the build, naming
a patient, if any follow-up in the cohort ends before its index date.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._judged import dated_and_placed
from pipeline.compile._plan import Stage
from pipeline.compile._sql import add_days, query
from pipeline.config import Criterion, Study

DEFAULT_STEP_TEXT = "added to fixed-date studies that end follow-up at loss of contact"


def _activity_rows(relation: str) -> exp.Query:
    """A further table's contact dates (``any_activity``), from its row judgement.

    A row counts by its judgement's record and timing parts alone (``dated_and_placed``): its
    code or value does not matter to whether the patient was in touch, but a row the reader set
    aside (entered in error, cancelled...), of an unknown patient, without a date, or dated
    after the end of data or the patient's death is no contact. Measurements are judged the
    same way as coded rows (``measurements_judged``), so the rule is the same for every table.
    """
    day = "obs_date" if relation == names.MEASUREMENTS_JUDGED else "row_date"
    rows = exp.select("patient_id", exp.column(day).as_("contact_date")).from_(relation)
    return rows.where(dated_and_placed())


_LAST_CONTACT = """
SELECT patient_id, MAX(contact_date) AS last_contact
FROM :contacts
GROUP BY patient_id
"""

_CONTACT_AT_INDEX = """
SELECT i.patient_id, MAX(c.contact_date) AS last_contact_by_index
FROM :index_dates AS i
JOIN :contacts AS c ON c.patient_id = i.patient_id AND c.contact_date <= :window_end
GROUP BY i.patient_id
"""

_NEGATIVE_FOLLOWUP = """
SELECT patient_id, index_date, followup_end, end_reason
FROM :cohort
WHERE followup_days < 0
ORDER BY patient_id
LIMIT 5
"""


def eligibility_with_default(study: Study) -> tuple[tuple[Criterion, ...], bool]:
    """The study's eligibility steps, with the default in-contact step first when it applies.

    Returns:
        The steps in order, and whether the first one was added by default.
    """
    steps = study.eligibility
    lost = study.followup.lost_contact_after_days
    if (
        study.index.fixed_date is None
        or lost is None
        or any(c.in_contact_at_index is not None for c in steps)
    ):
        return steps, False
    added = Criterion.model_validate({"in_contact_at_index": {"window": (-lost, 0)}})
    return (added, *steps), True


def uses_contact_rows(study: Study, steps: tuple[Criterion, ...]) -> bool:
    """Whether the plan needs the ``contact_rows`` relation."""
    return study.followup.contact == "any_activity" or any(
        c.in_contact_at_index is not None for c in steps
    )


def contact_stages(
    study: Study, steps: tuple[Criterion, ...], sources: tuple[str, ...]
) -> tuple[Stage, ...]:
    """``contact_rows`` (a view), and as needed ``last_contact`` and ``contact_at_index``.

    Args:
        study: The study.
        steps: The eligibility steps in force (see :func:`eligibility_with_default`).
        sources: The relations the plan has so far (to see which activity tables exist).
    """
    if not uses_contact_rows(study, steps):
        return ()
    parts = [exp.select("patient_id", exp.column("encounter_date").as_("contact_date"))]
    parts[0] = parts[0].from_(names.ENCOUNTER_ROWS)
    what = "usable encounters"
    if study.followup.contact == "any_activity":
        what = "usable dated rows of encounters, diagnoses, prescriptions and measurements read"
        for relation in sources:
            parts.append(_activity_rows(relation))
    union = parts[0]
    for part in parts[1:]:
        union = union.union(part, distinct=False)
    stages = [
        Stage(
            names.CONTACT_ROWS,
            union,
            f"contacts with the practice ({study.followup.contact}): {what}",
            kind="view",
        )
    ]
    if study.followup.contact == "any_activity":
        stages.append(
            Stage(
                names.LAST_CONTACT,
                query(_LAST_CONTACT, contacts=exp.to_table(names.CONTACT_ROWS)),
                "the last contact per patient, from which loss of contact is measured",
            )
        )
    step = next((c.in_contact_at_index for c in steps if c.in_contact_at_index), None)
    if step is not None:
        end = add_days(exp.column("index_date", "i"), step.window[1])
        stages.append(
            Stage(
                names.CONTACT_AT_INDEX,
                query(
                    _CONTACT_AT_INDEX,
                    index_dates=exp.to_table(names.INDEX_DATES),
                    contacts=exp.to_table(names.CONTACT_ROWS),
                    window_end=end,
                ),
                "each patient's last contact on or before the end of the in-contact window",
            )
        )
    return tuple(stages)


def last_contact_column(study: Study) -> exp.Expression:
    """The eligibility query's column from which loss of contact is measured."""
    if study.followup.contact == "any_activity":
        return exp.column("last_contact")
    return exp.column("last_encounter")


def in_contact_predicate(criterion: Criterion) -> tuple[exp.Expression, str]:
    """The in-contact step: a contact in the window and not deregistered before index."""
    assert criterion.in_contact_at_index is not None  # only called for this step
    start, end = criterion.in_contact_at_index.window
    last = exp.column("last_contact_by_index")
    contact = (
        last.is_(exp.null()).not_()
        if start is None
        else last >= add_days(exp.column("index_date"), start)
    )
    deregistration = exp.column("deregistration_date")
    registered = exp.or_(deregistration.is_(exp.null()), deregistration >= exp.column("index_date"))
    first = "all history" if start is None else f"day {start}"
    return (
        exp.and_(contact, registered),
        f"in contact at index: a contact from {first} to day {end} of index, "
        "and not deregistered before the index date",
    )


def negative_followup_check() -> Stage:
    """The check that fails the build, naming patients, if any follow-up ends before index."""
    return Stage(
        names.FOLLOWUP_NOT_NEGATIVE,
        query(_NEGATIVE_FOLLOWUP, cohort=exp.to_table(names.COHORT)),
        "no patient of the cohort may have follow-up ending before the index date",
        kind="check",
        failure=(
            "follow-up ends before the index date (add an in_contact_at_index or alive_at_index "
            "step, or narrow its window)"
        ),
    )
