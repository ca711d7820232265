"""Matched sets drawn from the source population, and sets opened by new users of a group.

``compile/_matching.py`` draws controls from the cohort for the incident cases of an outcome.
This module gives the stages that differ when the pool is the source population
(``controls_from: source_population``, and always for ``exposed_in``): the pool, the sets and
the candidate pairs. The contact spells, the limits of the fill and the ranked draws are the
cohort pool's own, read over this pool.

- **Sets** (``matching_sets``) come from the cohort: with ``cases_of``, each incident case of
  the outcome dated on its onset (as with the cohort pool); with ``exposed_in``, each cohort
  patient whose ``exposure`` is the group, dated on their index date. Numbered by set date,
  then patient id.
- **Pool** (``matching_pool``): every usable patient of the extract (``patient_base``), with
  the matching variables, registration, death and ``excluded_from``, the first day the
  patient can no longer be a control: the outcome's onset from ``condition_onsets`` (the
  condition's first onset over the whole history, whatever the cohort's look-back), or, for
  exposed sets, the earliest of the first record of ANY exposure group (``evidence_events``,
  over the whole history; a patient treated with the comparator is not an unexposed control)
  and the first onset of ANY outcome of the study (``condition_onsets``, as for case sets: a
  control, like the issue's controls, is free of the outcome on the set's date).
- **Eligible at the set's date** (``matching_candidates``): same sex, birth year within
  ``birth_year_within``, same practice with ``same_practice``; not the set's own patient;
  registered on the set's date (``registration_date`` on or before it, and
  ``deregistration_date`` missing or on or after it; an extract without registration dates,
  such as the committed synthetic one, leaves ``registration_date`` missing, and the patient
  then counts as registered from their records: the contact condition below already needs one
  on or before the set's date);
  alive on it (``death_date`` missing or on or after it, as in the cohort pool); in contact
  (a contact spell covering it, ``compile/_matching.py``); ``excluded_from`` missing or after
  the set's date, so a control may become a case, or exposed, the next day. Nothing of the
  cohort's eligibility (age, history, look-back) applies: the source population is the
  extract's registered patients.

The pool is the whole extract, so the candidate pairs grow with the sets times the extract's
patients of a set's sex and birth years, not only the cohort's.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._exposure import groups_table
from pipeline.compile._sql import query, value
from pipeline.config import Study
from pipeline.config._matching import Matching

SOURCE_POOL = "source_population"
"""The ``controls_from`` value for a pool of the extract's patients (``Matching.pool``)."""

_POOL = """
SELECT
  p.patient_id,
  p.sex,
  CAST(YEAR(p.birth_date) AS INT) AS birth_year,
  p.practice_id,
  p.registration_date,
  p.deregistration_date,
  p.death_date,
  f.excluded_from
FROM :base AS p
LEFT JOIN :firsts ON f.patient_id = p.patient_id
"""

_OUTCOME_FIRST = """
SELECT patient_id, :onset AS excluded_from
FROM :onsets
WHERE :onset IS NOT NULL
"""

_EXPOSURE_FIRST = """
SELECT e.patient_id, e.event_date AS first_day
FROM :events AS e
JOIN :groups ON g.evidence = e.evidence
"""

_OUTCOME_DAY = """
SELECT patient_id, :onset AS first_day
FROM :onsets
WHERE :onset IS NOT NULL
"""

# An exposed set's control must be untreated and free of every outcome of the study.
_EXPOSED_FIRST = """
SELECT patient_id, MIN(first_day) AS excluded_from
FROM :days
GROUP BY patient_id
"""

_SETS = """
SELECT
  CAST(ROW_NUMBER() OVER (ORDER BY :set_date, c.patient_id) AS INT) AS set_id,
  c.patient_id,
  :set_date AS set_date,
  c.sex,
  CAST(YEAR(p.birth_date) AS INT) AS birth_year,
  p.practice_id
FROM :cohort AS c
JOIN :base AS p ON p.patient_id = c.patient_id
WHERE :opens
"""

_CANDIDATES = """
SELECT
  s.set_id,
  q.patient_id,
  q.sex,
  q.birth_year,
  q.practice_id,
  MD5(CONCAT(:seed, '|', CAST(s.patient_id AS VARCHAR), '|', CAST(q.patient_id AS VARCHAR)))
    AS draw_key
FROM matching_sets AS s
CROSS JOIN :offsets
JOIN matching_pool AS q
  ON q.sex = s.sex AND q.birth_year = s.birth_year + o.year_offset AND :same_practice
JOIN matching_contact_spells AS k
  ON k.patient_id = q.patient_id AND s.set_date BETWEEN k.spell_start AND k.spell_end
WHERE q.patient_id <> s.patient_id
  AND (q.registration_date IS NULL OR q.registration_date <= s.set_date)
  AND (q.deregistration_date IS NULL OR q.deregistration_date >= s.set_date)
  AND (q.death_date IS NULL OR q.death_date >= s.set_date)
  AND (q.excluded_from IS NULL OR q.excluded_from > s.set_date)
"""


def _firsts(study: Study, option: Matching) -> exp.Expression:
    """Per patient, the first day they can no longer be a control, as subquery ``f``."""
    if option.exposed_in is not None:
        assert study.exposure is not None  # checked at load (matching_problems)
        days: exp.Query = query(
            _EXPOSURE_FIRST,
            events=exp.to_table(names.EVIDENCE_EVENTS),
            groups=groups_table(study.exposure),
        )
        for outcome in sorted(study.outcomes.conditions):
            onset = exp.column(names.onset_column(outcome))
            day = query(_OUTCOME_DAY, onset=onset, onsets=exp.to_table(names.CONDITION_ONSETS))
            days = days.union(day, distinct=False)
        first = query(_EXPOSED_FIRST, days=days.subquery("d"))
    else:
        onset = exp.column(names.onset_column(option.opener))
        first = query(_OUTCOME_FIRST, onset=onset, onsets=exp.to_table(names.CONDITION_ONSETS))
    return first.subquery("f")


def source_pool_query(study: Study, option: Matching) -> exp.Query:
    """``matching_pool`` over the extract's patients, with ``excluded_from``."""
    return query(_POOL, base=exp.to_table(names.PATIENT_BASE), firsts=_firsts(study, option))


def cohort_sets_query(option: Matching) -> exp.Query:
    """``matching_sets`` read from the cohort: incident cases, or new users of the group."""
    if option.exposed_in is not None:
        set_date = exp.column("index_date", "c")
        opens = exp.column(names.EXPOSURE, "c").eq(exp.Literal.string(option.exposed_in))
    else:
        outcome = names.outcome_columns(option.opener)
        set_date = exp.column(outcome.onset, "c")
        opens = exp.func("COALESCE", exp.column(outcome.incident, "c"), exp.false())
    return query(
        _SETS,
        set_date=set_date,
        opens=opens,
        cohort=exp.to_table(names.COHORT),
        base=exp.to_table(names.PATIENT_BASE),
    )


def source_candidates_query(
    option: Matching, offsets: exp.Expression, same_practice: exp.Expression
) -> exp.Query:
    """``matching_candidates`` from the source population (see the module docstring)."""
    return query(
        _CANDIDATES,
        seed=value(str(option.seed)),
        offsets=offsets,
        same_practice=same_practice,
    )


def pool_description(option: Matching) -> str:
    """One line on the pool stage for ``Plan.describe()``."""
    if option.exposed_in is not None:
        return (
            "the extract's patients with matching variables, registration and first exposure "
            "or outcome onset"
        )
    return f"the extract's patients with matching variables, registration and {option.opener} onset"


def sets_description(option: Matching) -> str:
    """One line on the sets stage."""
    if option.exposed_in is not None:
        return f"one set per new user of {option.exposed_in}, dated on the index date"
    return f"one set per incident {option.opener} case, dated on its onset, numbered by date"
