"""Measurement rows judged: every row for the quality log and contact, usable rows for values.

A measurement row's judgement has two parts: what its shape decides (reading, unit, plausibility:
``measurement_shapes``, judged once per distinct measure, unit, value and value_text) and what
depends on the row itself (its patient and date: the record and timing parts every event table
shares, compile/_judged.py). :func:`judge_rows` states the rule once; the stages here apply it
to the rows each reader needs, as the other tables' log applies ``_judge_events`` to theirs:

- ``measurement_rows`` (a view): every distinct row, with its raw values (``explain``, tests);
- ``measurements_judged`` (a view): every row of the extract once, read by the quality log's
  aggregate and by contact with the practice;
- ``measurement_values`` (a table): only the usable rows some later stage can read. The rows
  first meet the usable shapes of the measures the study reads (a few hundred rows, the build
  side of the join), so the tens of millions of rows with another measure or an unusable value
  are dropped before anything else is joined or stored. With the duplicate check, the rows
  that have exact copies come from ``measurement_copies`` (each once) and the others straight
  from the extract, so no row is grouped here;
- ``measurement_copies`` (a table, with the check): the distinct rows that have exact copies,
  found through a row hash and confirmed on all columns, for the log and the values.

Issue 24: materialising every judged row (77.5M at 2M patients) for two readers was the
measurement path's main cost; the quality log now counts the judgement in one aggregate pass
and finds duplicates through a row hash confirmed on all columns, as it does for the other
tables (:func:`pipeline.compile._judged.rows_with_copies`).
"""

from __future__ import annotations

import datetime as dt

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._judged import (
    grouped_rows,
    record_problem,
    rows_with_copies,
    timing_problem,
)
from pipeline.compile._sources import MEASUREMENTS
from pipeline.compile._sql import query

# A row's own judgement (its patient and date) first, in the quality log's order, then its
# shape's. Both parts are kept for contact with the practice. NULL keys meet NULL keys: a row
# without a unit has the shape without one.
_MEASUREMENT_ROWS = """
SELECT
  r.patient_id,
  r.obs_date,
  s.measure,
  s.qualifier,
  s.category,
  s.raw_value,
  s.raw_value_text,
  s.raw_unit,
  r.copies,
  r.source_position,
  r.source_problem,
  s.value,
  :record_problem AS record_problem,
  :timing_problem AS timing_problem,
  COALESCE(:record_problem, :timing_problem, s.problem) AS problem
FROM (
  SELECT
    patient_id,
    TRY_CAST(obs_date AS DATE) AS obs_date,
    measure,
    unit,
    value,
    value_text,
    copies,
    source_position,
    source_problem
  FROM :rows
) AS r
LEFT JOIN :base AS p ON p.patient_id = r.patient_id
LEFT JOIN :shapes ON s.key_measure IS NOT DISTINCT FROM r.measure
  AND s.key_unit IS NOT DISTINCT FROM r.unit
  AND s.key_value IS NOT DISTINCT FROM r.value
  AND s.key_value_text IS NOT DISTINCT FROM r.value_text
"""

# The record and timing parts of the judgement are kept for contact with the practice, which
# counts a measurement whatever its value (``dated_and_placed`` in compile/_judged.py).
_JUDGED = """
SELECT
  patient_id, obs_date, measure, value, qualifier, category, copies, source_position,
  source_problem, record_problem, timing_problem, problem
FROM :rows
"""

# The usable shapes of the measures the study reads: the only shapes a usable value can have.
_USABLE_SHAPES = """
SELECT key_measure, key_unit, key_value, key_value_text, measure, value, qualifier, category
FROM :shapes
WHERE problem IS NULL AND :wanted
"""

# The rows of a usable shape whose record and timing are sound (the same parts as
# ``measurement_rows``: with a usable shape, a row's problem is NULL exactly when both are),
# each with its raw columns, which tell a row from its copies.
_USABLE_ROWS = """
SELECT
  r.patient_id,
  r.obs_date,
  s.measure,
  s.value,
  s.qualifier,
  s.category,
  r.raw_date,
  s.key_measure,
  s.key_unit,
  s.key_value,
  s.key_value_text,
  r.source_problem
FROM (
  SELECT
    patient_id,
    obs_date AS raw_date,
    TRY_CAST(obs_date AS DATE) AS obs_date,
    measure,
    unit,
    value,
    value_text,
    source_problem
  FROM :source
) AS r
JOIN :usable ON s.key_measure IS NOT DISTINCT FROM r.measure
  AND s.key_unit IS NOT DISTINCT FROM r.unit
  AND s.key_value IS NOT DISTINCT FROM r.value
  AND s.key_value_text IS NOT DISTINCT FROM r.value_text
LEFT JOIN :base AS p ON p.patient_id = r.patient_id
WHERE :record_problem IS NULL AND :timing_problem IS NULL
"""

_VALUES = """
SELECT patient_id, obs_date, measure, value, qualifier, category, FALSE AS derived
FROM :rows
WHERE :kept
"""

# With the duplicate check, a row that is no exact copy of another stands alone; the rows that
# are come from ``measurement_copies``, each distinct row once. The copies are the small side.
_ALONE = """
SELECT u.*
FROM :rows
LEFT JOIN :copies ON c.patient_id IS NOT DISTINCT FROM u.patient_id
  AND c.obs_date IS NOT DISTINCT FROM u.raw_date
  AND c.measure IS NOT DISTINCT FROM u.key_measure
  AND c.unit IS NOT DISTINCT FROM u.key_unit
  AND c.value IS NOT DISTINCT FROM u.key_value
  AND c.value_text IS NOT DISTINCT FROM u.key_value_text
  AND c.source_problem IS NOT DISTINCT FROM u.source_problem
WHERE c.copies IS NULL
"""

# Each row counts once under its reason; rows with exact copies add their copies beyond the
# first as duplicates, unless they have no patient or the reader set them aside (see
# compile/_quality.py).
_EACH_ROW = """
SELECT COALESCE(problem, 'used') AS reason, 1 AS n_rows, 0 AS duplicates, source_position
FROM :judged
"""

_COPIES = """
SELECT
  COALESCE(problem, 'used') AS reason,
  0 AS n_rows,
  CASE WHEN patient_id IS NULL OR source_problem IS NOT NULL THEN 0 ELSE copies - 1 END
    AS duplicates,
  CAST(NULL AS BIGINT) AS source_position
FROM :judged
WHERE copies > 1
"""


def copies_table() -> exp.Query:
    """``measurement_copies``: the distinct measurement rows that have exact copies.

    Found as the other tables' are (:func:`pipeline.compile._judged.rows_with_copies`): the
    table grouped on one integer, the row's hash, and only rows sharing a hash grouped on all
    columns, so rows that merely collide stay apart and are left out here (one copy). Its rows
    are thus the same whatever the engine's hash. Stored, because the quality log counts the
    copies and ``measurement_values`` takes the usable ones from here instead of grouping its
    rows.
    """
    return rows_with_copies(MEASUREMENTS).having(exp.func("COUNT", exp.Star()) > 1)


def judge_rows(rows: exp.Query, end_of_data: dt.date) -> exp.Query:
    """Measurement ``rows`` with their shape's judgement and their own: the one rule.

    ``rows`` has the table's columns, ``source_problem``, ``source_position`` and ``copies``.
    """
    day = exp.column("obs_date", "r")
    return query(
        _MEASUREMENT_ROWS,
        rows=rows.subquery("g"),
        shapes=exp.to_table(names.MEASUREMENT_SHAPES).as_("s"),
        base=exp.to_table(names.PATIENT_BASE),
        record_problem=record_problem(day),
        timing_problem=timing_problem(day, end_of_data),
    )


def measurement_rows(*, check_duplicates: bool, end_of_data: dt.date) -> exp.Query:
    """Every distinct measurement row (every row without the check), judged."""
    return judge_rows(grouped_rows(MEASUREMENTS, check_duplicates=check_duplicates), end_of_data)


def measurements_judged(end_of_data: dt.date) -> exp.Query:
    """Every row of the extract once, judged: what contact and the quality log count."""
    rows = judge_rows(grouped_rows(MEASUREMENTS, check_duplicates=False), end_of_data)
    return query(_JUDGED, rows=rows.subquery("j"))


def usable_values(
    *,
    wanted: exp.Expression,
    kept: exp.Expression | None,
    check_duplicates: bool,
    end_of_data: dt.date,
) -> exp.Query:
    """The usable values ``kept`` selects (all usable ones when None), one per distinct row.

    Args:
        wanted: Which measures the study reads (on the shape's ``measure``).
        kept: Which usable rows later stages can read (``_kept_rows``), or None for all.
        check_duplicates: Whether exact copies count once (rows with a shared hash taken from
            ``measurement_copies``, each distinct row once), or every row stands alone.
        end_of_data: The study's end of data, for the timing part of the judgement.
    """

    def usable_rows(source: exp.Expression) -> exp.Query:
        day = exp.column("obs_date", "r")
        usable = query(_USABLE_SHAPES, shapes=exp.to_table(names.MEASUREMENT_SHAPES), wanted=wanted)
        return query(
            _USABLE_ROWS,
            source=source,
            usable=usable.subquery("s"),
            base=exp.to_table(names.PATIENT_BASE),
            record_problem=record_problem(day),
            timing_problem=timing_problem(day, end_of_data),
        )

    keep = exp.true() if kept is None else kept
    rows = usable_rows(exp.to_table(MEASUREMENTS.relation))
    if not check_duplicates:
        return query(_VALUES, rows=rows.subquery("u"), kept=keep)
    copies = exp.to_table(names.MEASUREMENT_COPIES)
    alone = query(_ALONE, rows=rows.subquery("u"), copies=copies.as_("c"))
    shared = usable_rows(copies.copy())
    return query(_VALUES, rows=alone.subquery("u"), kept=keep).union(
        query(_VALUES, rows=shared.subquery("u"), kept=keep.copy()), distinct=False
    )


def measurements_for_log(*, check_duplicates: bool, end_of_data: dt.date) -> exp.Query:
    """The measurement rows as the quality log counts them: reason, rows, duplicates.

    Every row counts once from ``measurements_judged``; with the check, the rows that have
    exact copies (few, found through a hash and confirmed on all columns) are judged by the
    same rule and add their copies beyond the first as duplicates.
    """
    each = query(_EACH_ROW, judged=exp.to_table(names.MEASUREMENTS_JUDGED))
    if not check_duplicates:
        return each
    copies = judge_rows(exp.select("*").from_(names.MEASUREMENT_COPIES), end_of_data)
    return each.union(query(_COPIES, judged=copies.subquery("j")), distinct=False)
