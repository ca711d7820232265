"""Matched controls: the candidate pairs of each case's set and their deterministic draw.

A study with ``matching:`` opens one set per incident case of the named outcome in the cohort,
dated on its onset (the set's date). Its candidates are the cohort's patients of the same sex,
born within ``birth_year_within`` years of the case (and at the same practice with
``same_practice``) who on the set's date are

- in the cohort's follow-up: index date before the set's date, ``followup_end`` on or after it,
  not dead and not deregistered before it (the case's own onset is after its index date, so
  both sides of a set are judged on the same days);
- in contact: a contact (as ``followup.contact`` counts them, ``compile/_contact.py``) on one of
  the ``contact_within_days`` days before the set's date or on it;
- free of the outcome: at risk of it at their own index and with no onset on or before the
  set's date; a control may become a case the next day (incidence-density sampling).

Candidates are ranked within their set by the MD5 of ``seed|case id|candidate id`` (text),
which DuckDB and Spark compute alike, so the same seed draws the same sets on both engines; an
engine's random function would not. Being in contact is judged on spells: consecutive contacts
at most ``contact_within_days`` apart form one spell, in contact from its first contact to its
last plus that many days; spells of a patient never overlap, so each candidate pair is found
once, by an equality join on sex and birth year (the set's birth year plus each allowed
difference) and a range condition on the spell.

With ``reuse_controls: true`` (with replacement) the draw is set-based: a set keeps the first
``controls_per_case`` candidates by rank. Without replacement a patient is a control in one set
at most, and which depends on every earlier set, so the sets are filled after the run, in
Python, in order of set date then case id (``outputs/_matched.py``). The plan fetches only the
candidates that fill can reach: a set can lose at most ``controls_per_case`` candidates to each
earlier set whose pool overlaps its own (same sex and practice, birth years at most twice
``birth_year_within`` apart), so ranks beyond ``controls_per_case * (1 + such sets)`` are never
needed. The candidate pairs grow with cases times the patients of a case's stratum.

That is the cohort pool. With ``controls_from: source_population``, or sets opened by the new
users of an exposure group (``exposed_in``), the pool, the sets and the candidate pairs are
those of ``compile/_matching_source.py`` (the extract's patients, judged on registration,
death and the first onset or exposure); the contact spells, the limits and the ranked draws
here are shared.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._contact import uses_contact_rows
from pipeline.compile._context import CompileContext
from pipeline.compile._matching_source import (
    SOURCE_POOL,
    cohort_sets_query,
    pool_description,
    sets_description,
    source_candidates_query,
    source_pool_query,
)
from pipeline.compile._plan import ColumnDoc, Stage
from pipeline.compile._sql import add_days, query, value, values_table
from pipeline.config._matching import Matching

MATCHED_OUTPUTS = ("matching_sets", "matching_draws")
"""The plan outputs ``outputs/_matched.py`` turns into ``matched.parquet``."""

_SPELLS = """
SELECT patient_id, MIN(contact_date) AS spell_start, :spell_end AS spell_end
FROM (
  SELECT
    patient_id,
    contact_date,
    SUM(starts) OVER (
      PARTITION BY patient_id ORDER BY contact_date
      ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW
    ) AS spell
  FROM (
    SELECT
      patient_id,
      contact_date,
      CASE
        WHEN LAG(contact_date) OVER (PARTITION BY patient_id ORDER BY contact_date) >= :gap_start
        THEN 0 ELSE 1
      END AS starts
    FROM (
      SELECT DISTINCT c.patient_id, c.contact_date
      FROM :contacts AS c
      JOIN matching_pool AS q ON q.patient_id = c.patient_id
    ) AS d
  ) AS m
) AS n
GROUP BY patient_id, spell
"""


def _contacts(relation: str) -> exp.Expression:
    """The contacts spells are made of: ``contact_rows``, or usable encounters as contacts."""
    if relation == names.CONTACT_ROWS:
        return exp.to_table(relation)
    dates = exp.select("patient_id", exp.column("encounter_date").as_("contact_date"))
    return dates.from_(relation).subquery()


_SETS = """
SELECT
  CAST(ROW_NUMBER() OVER (ORDER BY onset, patient_id) AS INT) AS set_id,
  patient_id,
  onset AS set_date,
  sex,
  birth_year,
  practice_id
FROM matching_pool
WHERE incident
"""

# One row per (set, candidate); the spell join finds a candidate's contact at most once.
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
  AND q.at_risk
  AND q.index_date < s.set_date
  AND s.set_date <= q.followup_end
  AND (q.onset IS NULL OR q.onset > s.set_date)
  AND (q.death_date IS NULL OR q.death_date >= s.set_date)
  AND (q.deregistration_date IS NULL OR q.deregistration_date >= s.set_date)
"""

# Without replacement: the most candidates of a set the sequential fill can ever reach.
_LIMITS = """
SELECT s.set_id, :controls * (1 + COUNT(e.set_id)) AS draw_limit
FROM matching_sets AS s
CROSS JOIN :offsets
LEFT JOIN matching_sets AS e
  ON e.sex = s.sex
  AND e.birth_year = s.birth_year + o.year_offset
  AND e.set_id < s.set_id
  AND :same_practice
GROUP BY s.set_id
"""

_RANKED = """
SELECT
  set_id,
  patient_id,
  sex,
  birth_year,
  practice_id,
  CAST(ROW_NUMBER() OVER (PARTITION BY set_id ORDER BY draw_key, patient_id) AS INT)
    AS draw_rank
FROM matching_candidates
"""


def _offsets(within: int) -> exp.Expression:
    """The allowed birth-year differences as a literal table ``o(year_offset)``."""
    return values_table("o", ["year_offset"], [(d,) for d in range(-within, within + 1)])


def _same_practice(option: Matching, left: str, right: str) -> exp.Expression:
    if not option.same_practice:
        return exp.true()
    return exp.column("practice_id", left).eq(exp.column("practice_id", right))


def _pool_query(name: str) -> exp.Query:
    """The cohort with what matching reads: matching variables, follow-up, the outcome."""
    column = exp.column
    outcome = names.outcome_columns(name)
    return (
        exp.select(
            column("patient_id", "c"),
            column("sex", "c"),
            exp.cast(exp.Year(this=column("birth_date", "p")), "INT").as_("birth_year"),
            column("practice_id", "p"),
            column("index_date", "c"),
            column("followup_end", "c"),
            column("death_date", "p"),
            column("deregistration_date", "p"),
            column(outcome.at_risk, "c").as_("at_risk"),
            exp.func("COALESCE", column(outcome.incident, "c"), exp.false()).as_("incident"),
            column(outcome.onset, "c").as_("onset"),
        )
        .from_(exp.to_table(names.COHORT).as_("c"))
        .join(exp.to_table(names.PATIENT_BASE).as_("p"), on="p.patient_id = c.patient_id")
    )


def matching_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """The pool, contact spells, sets, candidate pairs and ranked draws.

    Nothing without ``matching:``.
    """
    option = ctx.study.matching
    if option is None:
        return ()
    contacts = (
        names.CONTACT_ROWS
        if uses_contact_rows(ctx.study, ctx.eligibility)
        else names.ENCOUNTER_ROWS
    )
    within = option.contact_within_days
    spells = query(
        _SPELLS,
        contacts=_contacts(contacts),
        spell_end=add_days(exp.func("MAX", exp.column("contact_date")), within),
        gap_start=add_days(exp.column("contact_date"), -within),
    )
    from_source = option.pool == SOURCE_POOL
    if from_source:
        pool = Stage(
            "matching_pool", source_pool_query(ctx.study, option), pool_description(option)
        )
        sets = cohort_sets_query(option)
        candidates = source_candidates_query(
            option, _offsets(option.birth_year_within), _same_practice(option, "q", "s")
        )
    else:
        pool = Stage(
            "matching_pool",
            _pool_query(option.opener),
            f"the cohort with its matching variables, follow-up and {option.opener} onset",
        )
        sets = query(_SETS)
        candidates = query(
            _CANDIDATES,
            seed=value(str(option.seed)),
            offsets=_offsets(option.birth_year_within),
            same_practice=_same_practice(option, "q", "s"),
        )
    ranked = query(_RANKED).subquery("r")
    if option.reuse_controls:
        draws = (
            exp.select(exp.Star())
            .from_(ranked)
            .where(exp.column("draw_rank") <= option.controls_per_case)
        )
    else:
        draws = (
            exp.select(*(exp.column(c, "r") for c in _DRAW_COLUMNS))
            .from_(ranked)
            .join("matching_limits AS l", on="l.set_id = r.set_id")
            .where("r.draw_rank <= l.draw_limit")
        )
    stages = [
        pool,
        Stage(
            "matching_contact_spells",
            spells,
            f"spells in contact: contacts at most {within} days apart, to the last + {within}",
        ),
        Stage("matching_sets", sets, sets_description(option)),
        Stage(
            "matching_candidates",
            candidates,
            "every eligible control of every set, with its draw key (MD5 of seed, case, control)",
        ),
    ]
    if not option.reuse_controls:
        stages.append(
            Stage(
                "matching_limits",
                query(
                    _LIMITS,
                    controls=option.controls_per_case,
                    offsets=_offsets(2 * option.birth_year_within),
                    same_practice=_same_practice(option, "e", "s"),
                ),
                "the most ranked candidates each set's fill without replacement can reach",
            )
        )
    stages.append(
        Stage(
            "matching_draws",
            draws,
            "candidates ranked by draw key within each set, as far as the fill can need them",
        )
    )
    return tuple(stages)


_DRAW_COLUMNS = ("set_id", "patient_id", "sex", "birth_year", "practice_id", "draw_rank")


def matching_outputs(ctx: CompileContext) -> tuple[tuple[str, str, tuple[str, ...]], ...]:
    """The plan outputs the build fetches to write ``matched.parquet`` (none without it)."""
    if ctx.study.matching is None:
        return ()
    return (
        ("matching_sets", "matching_sets", ("set_id",)),
        ("matching_draws", "matching_draws", ("set_id", "draw_rank")),
    )


def matched_docs(ctx: CompileContext) -> tuple[ColumnDoc, ...]:
    """The data dictionary of ``matched.parquet``, every column in file order."""
    option = ctx.study.matching
    if option is None:
        return ()
    name = option.opener
    who = "case" if option.exposed_in is None else "exposed patient"
    replacement = (
        "with replacement: a patient may be a control of several sets"
        if option.reuse_controls
        else "without replacement: a patient is a control of one set at most; sets filled in "
        f"order of set date, then {who} id"
    )
    if option.exposed_in is None:
        opened = (
            "incident case",
            f"ROW_NUMBER over incident {name} cases ordered by "
            f"{names.onset_column(name)}, patient_id",
        )
        role = ("case or control", "case: the set's own case")
        index = (
            "the set's date: the case's onset; a control's index date in the matched analysis",
            f"{names.onset_column(name)} of the set's case",
            "diagnoses, prescriptions, measurements",
        )
    else:
        opened = (
            f"new user of {name}",
            f"ROW_NUMBER over cohort patients with exposure "
            f"'{name}' ordered by index_date, patient_id",
        )
        role = (
            "exposed (the set's new user of the group) or control",
            "exposed: the set's own patient; control: not yet exposed to any group, and free "
            "of the study's outcomes, on the date",
        )
        index = (
            "the set's date: the exposed patient's index date; a control's index date in the "
            "matched analysis",
            "index_date of the set's exposed patient",
            "prescriptions",
        )
    patient_from = (
        "from cohort.parquet"
        if option.pool != SOURCE_POOL
        else "the set's patient from cohort.parquet; controls from the extract's patients"
    )
    docs = [
        ColumnDoc(
            "set_id",
            "INTEGER",
            "",
            f"the matched set: one per {opened[0]}, numbered 1, 2, ... by set date, then {who} id",
            opened[1],
            "cohort",
        ),
        ColumnDoc("role", "VARCHAR", "", role[0], role[1], "study"),
        ColumnDoc(
            "control_number",
            "INTEGER",
            "",
            f"0 for the {who}; 1, 2, ... for controls in the order they were drawn",
            f"controls ranked by MD5 of 'seed|{who} id|control id' (seed {option.seed}), "
            f"up to {option.controls_per_case}; {replacement}",
            "study",
        ),
        ColumnDoc(
            "patient_id",
            "same as cohort.parquet",
            "",
            "the patient",
            patient_from,
            "extract",
        ),
        ColumnDoc("index_date", "DATE", "date", *index),
        ColumnDoc(
            "sex",
            "VARCHAR",
            "",
            "sex recorded (the same in every row of a set)",
            "from patients.sex, upper case",
            "patients",
        ),
        ColumnDoc(
            "birth_year",
            "INTEGER",
            "year",
            f"year of birth; a control's is within {option.birth_year_within} of its {who}'s",
            "year of patients.birth_date (1 July of birth_year when only the year is known)",
            "patients",
        ),
    ]
    if option.same_practice:
        docs.append(
            ColumnDoc(
                "practice_id",
                "VARCHAR",
                "",
                "the practice (the same in every row of a set)",
                "from patients.practice_id",
                "patients",
            )
        )
    return tuple(docs)
