"""One judgement per extract row: each source table's row-judgement view.

Whether a row may be used, and if not the reason the quality log gives, is decided here once
per table (``patients_judged``, ``encounters_judged``, ``diagnoses_judged``,
``prescriptions_judged``; measurements are judged in ``measurements_judged``, see
``compile/_measurements.py``). The usable-row stages read ``reason = 'used'`` from these views
and the quality log counts their reasons, so the two can never disagree on a row.

An event row's judgement has three parts, applied in the quality log's order:

- ``record_problem``: the reader set it aside (``source_problem``), its patient is unknown
  (``orphan patient``), or its date cannot be read (``unparseable date``);
- ``code_problem`` (coded tables): its distinct code is malformed or of an unknown system,
  judged once per distinct code in ``distinct_codes``;
- ``timing_problem``: dated after the end of data or after the patient's death.

``reason`` is the first part that applies, or ``used``. Contact with the practice
(``followup.contact: any_activity``) counts a coded row whatever its code, so it reads the
record and timing parts alone (:func:`dated_and_placed`).
"""

from __future__ import annotations

import datetime as dt

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._plan import SOURCE_POSITION, SOURCE_PROBLEM, SourceTable, Stage
from pipeline.compile._sql import days_between, template, value
from pipeline.extract.schema import canonical_table

_PATIENT_REASON = """
CASE
  WHEN source_problem IS NOT NULL THEN source_problem
  WHEN patient_id IS NULL THEN 'missing patient_id'
  WHEN :unreadable_date THEN 'unparseable date'
  ELSE :used
END
"""

# ``r`` is the row, ``p`` its patient in patient_base (joined on the left); ``:day`` its date.
_RECORD_PROBLEM = """
CASE
  WHEN r.source_problem IS NOT NULL THEN r.source_problem
  WHEN p.patient_id IS NULL THEN 'orphan patient'
  WHEN :day IS NULL THEN 'unparseable date'
END
"""

_TIMING_PROBLEM = """
CASE
  WHEN :day > :end_of_data THEN 'after end of data'
  WHEN p.death_date IS NOT NULL AND :day > p.death_date THEN 'after death'
END
"""


def record_problem(day: exp.Expression) -> exp.Expression:
    """What is wrong with a row's record: the reader's problem, an unknown patient, no date.

    The row is ``r`` (with ``source_problem``), its patient ``p`` (``patient_base``, joined on
    the left), ``day`` the row's date. NULL when the record is sound. Shared by every event
    table's judgement and the measurements' (``measurement_rows``), so contact and the quality
    log read the same parts whatever the table.
    """
    return template(_RECORD_PROBLEM, day=day)


def timing_problem(day: exp.Expression, end_of_data: dt.date) -> exp.Expression:
    """A row dated after the end of data or after its patient's death (NULL otherwise)."""
    return template(_TIMING_PROBLEM, day=day, end_of_data=end_of_data)


def patients_judged(table: SourceTable, unreadable_date: exp.Expression) -> Stage:
    """``patients_judged``: every patients row with its reason (``used`` or why not)."""
    rows = exp.select(*table.columns, SOURCE_PROBLEM, SOURCE_POSITION).from_(table.relation)
    return Stage(
        names.judged_stage(table.name),
        _judge_patients(rows.subquery("r"), unreadable_date),
        "every patients row judged once: used, or the reason the quality log gives",
        kind="view",
    )


def _judge_patients(rows: exp.Expression, unreadable_date: exp.Expression) -> exp.Select:
    """Patients ``rows`` (a relation), each with its reason."""
    reason = template(_PATIENT_REASON, unreadable_date=unreadable_date, used=names.USED)
    return exp.select(exp.Star(), reason.as_("reason")).from_(rows)


def event_judged(
    table: SourceTable,
    *,
    end_of_data: dt.date,
    raw_codes: dict[str, exp.Expression] | None = None,
) -> Stage:
    """``<table>_judged`` for an event table: every row, its problems and its reason.

    Args:
        table: The extract table (encounters, diagnoses or prescriptions).
        end_of_data: The study's end of data.
        raw_codes: For a coded table, its raw system, code and source as text (the keys of
            ``distinct_codes``); the view then carries them with ``source_table`` and
            ``duration_days`` and takes each row's code problem from ``distinct_codes``.
    """
    rows = exp.select(*table.columns, SOURCE_PROBLEM, SOURCE_POSITION).from_(table.relation)
    return Stage(
        names.judged_stage(table.name),
        _judge_events(table, rows, end_of_data=end_of_data, raw_codes=raw_codes),
        f"every {table.name} row judged once: used, or the reason the quality log gives",
        kind="view",
    )


def _judge_events(
    table: SourceTable,
    rows: exp.Select,
    *,
    end_of_data: dt.date,
    raw_codes: dict[str, exp.Expression] | None,
) -> exp.Select:
    """Event ``rows`` (a query over the table's columns) with their problems and reason.

    The one statement of the rule: the row-judgement view applies it to the extract's rows,
    the quality log with the duplicate check to its distinct rows.
    """
    # The date that places the row in time is the schema's (extract/schema.py).
    row_date = exp.TryCast(
        this=exp.column(canonical_table(table.name).row_date), to=exp.DataType.build("DATE")
    )
    rows = rows.select(row_date.as_("row_date"))
    if raw_codes is not None:
        rows = rows.select(value(table.name).as_("source_table"))
        rows = rows.select(*(c.as_(n) for n, c in raw_codes.items()))
        rows = rows.select(_duration(table.name, row_date).as_("duration_days"))
    day = exp.column("row_date", "r")
    parts = [record_problem(day).as_("record_problem")]
    if raw_codes is not None:
        parts.append(exp.column("problem", "c").as_("code_problem"))
    parts.append(timing_problem(day, end_of_data).as_("timing_problem"))
    judged = (
        exp.select(exp.column(exp.Star(), "r"), *parts)
        .from_(rows.subquery("r"))
        .join(
            exp.to_table(names.PATIENT_BASE).as_("p"),
            on=exp.column("patient_id", "p").eq(exp.column("patient_id", "r")),
            join_type="left",
        )
    )
    if raw_codes is not None:
        judged = judged.join(
            exp.to_table(names.DISTINCT_CODES).as_("c"),
            on=same_raw_code("r", "c"),
            join_type="left",
        )
    # The quality log's order: the record, then the code, then the timing.
    reason = exp.func("COALESCE", *(exp.column(p.alias) for p in parts), value(names.USED))
    return exp.select(exp.Star(), reason.as_("reason")).from_(judged.subquery("j"))


def dated_and_placed() -> exp.Expression:
    """A judged event row with a known patient and a usable date, whatever its code."""
    return exp.and_(
        exp.column("record_problem").is_(exp.null()),
        exp.column("timing_problem").is_(exp.null()),
    )


def is_used() -> exp.Expression:
    """The one test of a usable row, on a row-judgement view."""
    return exp.column("reason").eq(value(names.USED))


def grouped_rows(table: SourceTable, *, check_duplicates: bool) -> exp.Query:
    """Distinct rows of a source table with how many copies of each the extract holds.

    A row's position is its first copy's. Without the duplicate check every row stands alone
    (``copies`` is 1): no grouping. The reader's own problem with a row (``source_problem``)
    is part of the row: a refuted diagnosis is no copy of a confirmed one on the same day.
    """
    rows = exp.select(*table.columns, SOURCE_PROBLEM).from_(table.relation)
    if not check_duplicates:
        return rows.select(exp.column(SOURCE_POSITION), exp.Literal.number(1).as_("copies"))
    first = exp.func("MIN", exp.column(SOURCE_POSITION)).as_(SOURCE_POSITION)
    copies = exp.func("COUNT", exp.Star()).as_("copies")
    return rows.select(first, copies).group_by(*table.columns, SOURCE_PROBLEM)


def row_hash(columns: list[exp.Expression]) -> exp.Expression:
    """A row's hash over ``columns``: only a filter, never the test of two rows being copies.

    Rows with equal columns have equal hashes in DuckDB (``HASH``, 64 bits) and Spark
    (``hash``, Murmur3, 32 bits), NULLs included, so every pair of exact copies shares a hash;
    rows that share a hash without being copies are told apart by the exact grouping that
    follows (:func:`rows_with_copies`). A weaker hash (Spark's, or a constant in a test)
    lets more rows through that filter and costs time, never a different answer.
    """
    return exp.func("HASH", *columns)


def rows_with_copies(table: SourceTable) -> exp.Select:
    """The distinct rows of ``table`` whose hash another row shares, with their copies.

    Only these rows can have exact copies. Finding them groups the table on one integer
    (the row's hash) instead of on all its columns, and only the few rows that share a hash
    are then grouped on all their columns, which is the exact confirmation: rows that merely
    collide stay apart with one copy each. ``source_problem`` is part of the row, as in
    :func:`grouped_rows`. Issue 24: grouping every row on every column was most of the
    quality log's time.
    """
    hashed = row_hash([exp.column(c) for c in (*table.columns, SOURCE_PROBLEM)])
    shared = (
        exp.select(hashed.copy().as_("row_hash"))
        .from_(table.relation)
        .group_by(hashed.copy())
        .having(exp.func("COUNT", exp.Star()) > 1)
    )
    candidates = (
        exp.select(*table.columns, SOURCE_PROBLEM, SOURCE_POSITION)
        .from_(table.relation)
        .where(hashed.copy().isin(query=shared))
    )
    first = exp.func("MIN", exp.column(SOURCE_POSITION)).as_(SOURCE_POSITION)
    copies = exp.func("COUNT", exp.Star()).as_("copies")
    return (
        exp.select(*table.columns, SOURCE_PROBLEM, first, copies)
        .from_(candidates.subquery("h"))
        .group_by(*table.columns, SOURCE_PROBLEM)
    )


def judged_for_log(
    table: SourceTable,
    *,
    check_duplicates: bool,
    end_of_data: dt.date,
    raw_codes: dict[str, exp.Expression] | None = None,
    unreadable_date: exp.Expression | None = None,
) -> exp.Query:
    """A table's judged rows as the quality log counts them: reason, rows, duplicates.

    Every row of the table's row-judgement view counts once under its reason
    (``n_rows`` 1, ``duplicates`` 0, its position). With the duplicate check, the rows that
    have exact copies (:func:`rows_with_copies`: few, found through a hash) are judged again
    by the same rule (:func:`_judge_events`, :func:`_judge_patients`; copies share a reason,
    since a row's reason follows from its columns) and add, under that reason, their copies
    beyond the first as duplicates (``n_rows`` 0). The log's distinct rows are then
    ``n_rows - duplicates``. Rows without a patient or set aside by the reader are counted
    whole: their copies are no duplicates (see the quality log).
    """
    each = exp.select(
        "reason",
        exp.Literal.number(1).as_("n_rows"),
        exp.Literal.number(0).as_("duplicates"),
        SOURCE_POSITION,
    ).from_(names.judged_stage(table.name))
    if not check_duplicates:
        return each
    rows = rows_with_copies(table)
    if table.name == "patients":
        if unreadable_date is None:
            raise TypeError("the patients table is judged with its unreadable-date test")
        judged = _judge_patients(rows.subquery("r"), unreadable_date)
    else:
        distinct = exp.select(*table.columns, SOURCE_PROBLEM, SOURCE_POSITION, "copies")
        judged = _judge_events(
            table,
            distinct.from_(rows.subquery("g")),
            end_of_data=end_of_data,
            raw_codes=raw_codes,
        )
    whole = exp.or_(
        exp.column("patient_id").is_(exp.null()),
        exp.column(SOURCE_PROBLEM).is_(exp.null()).not_(),
    )
    beyond_first = exp.Case(ifs=[exp.If(this=whole, true=exp.Literal.number(0))]).else_(
        exp.column("copies") - 1
    )
    copies = exp.select(
        "reason",
        exp.Literal.number(0).as_("n_rows"),
        beyond_first.as_("duplicates"),
        exp.cast(exp.null(), "BIGINT").as_(SOURCE_POSITION),
    ).from_(judged.subquery("j"))
    return each.union(copies.where(exp.column("copies") > 1), distinct=False)


def same_raw_code(row: str, code: str) -> exp.Expression:
    """A coded row joined to its entry of ``distinct_codes`` or ``codes_to_evidence``.

    ``row`` and ``code`` are the aliases; both carry source_table and the raw_* columns, and
    NULLs compare equal.
    """
    same = [
        exp.NullSafeEQ(this=exp.column(c, row), expression=exp.column(c, code))
        for c in ("raw_system", "raw_code", "raw_source")
    ]
    return exp.and_(exp.column("source_table", row).eq(exp.column("source_table", code)), *same)


def _duration(table: str, row_date: exp.Expression) -> exp.Expression:
    """A prescription's length in days, both ends counted (NULL for diagnoses)."""
    if table != "prescriptions":
        return exp.cast(exp.null(), "INT")
    stop = exp.TryCast(this=exp.column("stop_date"), to=exp.DataType.build("DATE"))
    return exp.cast(days_between(row_date.copy(), stop) + 1, "INT")
