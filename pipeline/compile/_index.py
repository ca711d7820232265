"""The index date of each patient, by the study's strategy; who has one is the source population.

- ``first_encounter``: the first usable encounter in the window (of some types, if given);
- ``fixed_date``: one calendar date for everyone with a usable encounter on or before it;
- ``first_event``: the first event of some evidence, or a condition's onset, in the window;
- ``exposure_start``: the first record of an exposure group in the window (``_exposure``);
- ``random_encounter``: one encounter day in the window per patient, drawn by hashing the seed,
  the patient and the day with MD5, which every engine computes the same way.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._context import INDEX_EVENT, CompileContext, evidence_id
from pipeline.compile._exposure import exposure_index_stage
from pipeline.compile._plan import Stage
from pipeline.compile._sql import query, value

_FIRST_ENCOUNTER = """
SELECT patient_id, first_in_window AS index_date
FROM :summary
WHERE first_in_window IS NOT NULL
"""

_FIXED_DATE = """
SELECT patient_id, :day AS index_date
FROM :summary
WHERE first_encounter <= :day
"""

_FIRST_EVIDENCE = """
SELECT patient_id, MIN(event_date) AS index_date
FROM :events
WHERE evidence = :key AND event_date BETWEEN :start AND :end
GROUP BY patient_id
"""

_CONDITION_ONSET = """
SELECT patient_id, onset_date AS index_date
FROM :onsets
WHERE onset_date BETWEEN :start AND :end
"""

_RANDOM_ENCOUNTER = """
SELECT patient_id, encounter_date AS index_date
FROM (
  SELECT
    patient_id,
    encounter_date,
    ROW_NUMBER() OVER (
      PARTITION BY patient_id
      ORDER BY MD5(CONCAT(:seed, '|', CAST(patient_id AS VARCHAR), '|',
        CAST(encounter_date AS VARCHAR))), encounter_date
    ) AS draw
  FROM (
    SELECT DISTINCT patient_id, encounter_date
    FROM :encounters
    WHERE encounter_date BETWEEN :start AND :end
  ) AS days
) AS drawn
WHERE draw = 1
"""


def index_stage(ctx: CompileContext) -> Stage:
    """``index_dates``: one row per patient in the source population."""
    rule = ctx.study.index
    if rule.exposure_start is not None:
        return exposure_index_stage(ctx.study)
    if rule.first_encounter is not None:
        start, end = rule.first_encounter.between
        kinds = (
            f" of type {', '.join(rule.first_encounter.type)}" if rule.first_encounter.type else ""
        )
        return Stage(
            names.INDEX_DATES,
            query(_FIRST_ENCOUNTER, summary=exp.to_table(names.ENCOUNTER_SUMMARY)),
            f"index: the first encounter{kinds} between {start} and {end}",
        )
    if rule.fixed_date is not None:
        return Stage(
            names.INDEX_DATES,
            query(_FIXED_DATE, summary=exp.to_table(names.ENCOUNTER_SUMMARY), day=rule.fixed_date),
            f"index: {rule.fixed_date} for everyone with an encounter on or before it",
        )
    if rule.first_event is not None:
        event = rule.first_event
        start, end = event.between
        if event.condition is not None:
            onsets = names.onset_stage(event.condition)
            return Stage(
                names.INDEX_DATES,
                query(_CONDITION_ONSET, onsets=exp.to_table(onsets), start=start, end=end),
                f"index: the onset of {event.condition} between {start} and {end}",
            )
        return Stage(
            names.INDEX_DATES,
            query(
                _FIRST_EVIDENCE,
                events=exp.to_table(names.EVIDENCE_EVENTS),
                key=evidence_id(INDEX_EVENT),
                start=start,
                end=end,
            ),
            f"index: the first qualifying event between {start} and {end}",
        )
    draw = rule.random_encounter
    assert draw is not None  # the model requires exactly one strategy
    start, end = draw.between
    return Stage(
        names.INDEX_DATES,
        query(
            _RANDOM_ENCOUNTER,
            encounters=exp.to_table(names.ENCOUNTER_ROWS),
            seed=value(str(draw.seed)),
            start=start,
            end=end,
        ),
        f"index: one encounter day between {start} and {end} drawn with seed {draw.seed}",
    )


def index_description(ctx: CompileContext) -> str:
    """How the source population was formed, for the first attrition line."""
    return index_stage(ctx).description.removeprefix("index: ")
