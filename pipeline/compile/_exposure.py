"""New users of exposure groups: the index date, the group started and the new-user steps.

With ``index: {exposure_start: ...}`` and an ``exposure:`` section, each group's evidence is
matched like any study evidence (key ``@exposure.<group>``, in ``evidence_events``). The index
date is a patient's first record of any group in the index window. ``index_dates`` also
carries, for the eligibility steps that come before the study's own:

- ``exposure_washout_records``: group-days recorded in the ``washout_days`` days before the
  index date (index - washout_days to index - 1, both included); 0 makes a new user;
- ``exposure_groups_at_index``: how many groups are recorded on the index day; only 1 says
  which treatment was started;
- ``exposure``: the group started (empty when two or more were recorded that day).

Evidence is counted per day, so two prescriptions of one group on a day are one group-day.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._context import evidence_number, exposure_key
from pipeline.compile._plan import ColumnDoc, Stage
from pipeline.compile._sql import query, values_table
from pipeline.config import Study
from pipeline.config._exposure import Exposure

# The big relation (evidence_events) stays on the left of every join: the small literal table
# of groups and the patients' first days are the build sides (see DEVELOPERS.md, engine notes).
_EXPOSURE_START = """
WITH starts AS (
  SELECT e.patient_id, MIN(e.day) AS first_day
  FROM :events AS e
  JOIN :groups ON g.evidence = e.evidence
  WHERE e.event_date BETWEEN :start AND :end
  GROUP BY e.patient_id
), around AS (
  SELECT
    e.patient_id,
    e.event_date,
    e.day,
    s.first_day,
    g.exposure_group
  FROM :events AS e
  JOIN :groups ON g.evidence = e.evidence
  JOIN starts AS s ON s.patient_id = e.patient_id
  WHERE e.day BETWEEN s.first_day - :washout AND s.first_day
)
SELECT
  patient_id,
  MIN(CASE WHEN day = first_day THEN event_date END) AS index_date,
  CASE
    WHEN COUNT(DISTINCT CASE WHEN day = first_day THEN exposure_group END) = 1
    THEN MIN(CASE WHEN day = first_day THEN exposure_group END)
  END AS exposure,
  CAST(COUNT(DISTINCT CASE WHEN day = first_day THEN exposure_group END) AS INT)
    AS exposure_groups_at_index,
  CAST(COUNT(CASE WHEN day < first_day THEN 1 END) AS INT) AS exposure_washout_records
FROM around
GROUP BY patient_id
"""


def groups_table(exposure: Exposure) -> exp.Expression:
    """The groups' evidence numbers as a literal table ``g(evidence, exposure_group)``."""
    rows = [(evidence_number(exposure_key(g)), g) for g in sorted(exposure.groups)]
    return values_table("g", ["evidence", "exposure_group"], rows)


def exposure_index_stage(study: Study) -> Stage:
    """``index_dates`` of a new-user study, with the columns its two steps read."""
    exposure = study.exposure
    window = study.index.exposure_start
    assert exposure is not None  # checked at load (exposure_problems)
    assert window is not None
    start, end = window.between
    return Stage(
        names.INDEX_DATES,
        query(
            _EXPOSURE_START,
            events=exp.to_table(names.EVIDENCE_EVENTS),
            groups=groups_table(exposure),
            start=start,
            end=end,
            washout=exposure.washout_days,
        ),
        f"index: the first record of an exposure group ({', '.join(exposure.groups)}) "
        f"between {start} and {end}",
    )


def exposure_index_columns() -> tuple[str, ...]:
    """The columns ``index_dates`` adds for a new-user study, as ``eligibility`` keeps them."""
    return (names.EXPOSURE, names.EXPOSURE_GROUPS_AT_INDEX, names.EXPOSURE_WASHOUT_RECORDS)


def exposure_steps(study: Study) -> list[tuple[str, exp.Expression, str]]:
    """The new-user steps (name, predicate on ``eligibility``, text), before the study's own."""
    exposure = study.exposure
    if exposure is None:
        return []
    groups = ", ".join(exposure.groups)
    return [
        (
            "new_user",
            exp.column(names.EXPOSURE_WASHOUT_RECORDS).eq(0),
            f"no record of any exposure group ({groups}) in the {exposure.washout_days} days "
            "before index (a new user)",
        ),
        (
            "one_exposure_group",
            exp.column(names.EXPOSURE_GROUPS_AT_INDEX).eq(1),
            "a record of one exposure group only on the index day",
        ),
    ]


def exposure_doc(study: Study) -> ColumnDoc:
    """The dictionary entry of the cohort's ``exposure`` column."""
    exposure = study.exposure
    assert exposure is not None  # only documented for a new-user study
    return ColumnDoc(
        names.EXPOSURE,
        "VARCHAR",
        "",
        f"the exposure group started on the index date: one of {', '.join(exposure.groups)}",
        f"the group of the first record of any group in the index window; patients with a "
        f"record of any group in the {exposure.washout_days} days before it, or of two groups "
        "on the index day, are not in the cohort",
        "prescriptions" if all(ev.prescription for ev in exposure.groups.values()) else "extract",
    )
