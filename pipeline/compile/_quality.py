"""The quality log: every extract row is either used or counted under the reason it was not.

Every row gets the first reason that applies, or ``used``, once, in its table's row-judgement
stage (``compile/_judged.py``; measurements in ``compile/_measurement_rows.py``), which the
usable-row stages read too. The log counts each judged row once, and finds exact duplicates
through a row hash confirmed on all columns (``judged_for_log``): the first copy counts under
its reason, the others as duplicates, unless the row has no readable patient_id (see _SUMMARY).
A separate count of rows read lets the build check that used + set aside = read for every
table. Each reason also keeps the position of the first row it set aside (CSV only; see
SOURCE_POSITION), so a user can find it.
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._context import CompileContext
from pipeline.compile._judged import judged_for_log
from pipeline.compile._measurement_rows import measurements_for_log
from pipeline.compile._plan import SourceTable, Stage
from pipeline.compile._sources import (
    coded_tables,
    raw_code_columns,
    source_tables,
    unreadable_patient_date,
)
from pipeline.compile._sql import query, value


@dataclass(frozen=True)
class SetAsideReason:
    """What one quality-log reason says about the extract, and what to do when it is common.

    Attributes:
        misread: True when many rows set aside for this reason mean the extract was read
            wrongly (a date format, an id column, a code-system spelling), so a build where
            more than the study's share of a table is set aside for it is refused. False when
            the reason follows from the study's design (its end of data, deaths, the measures
            it knows, duplicates); those never stop a build.
        tables: The extract tables whose rows the reason can set aside.
        hint: What to check or change, shown when a misread reason stops a build.
    """

    misread: bool
    tables: tuple[str, ...]
    hint: str


_EVENTS = ("encounters", "diagnoses", "prescriptions", "measurements")
_ALL = ("patients", *_EVENTS)

# Every reason the quality log can give, spelt exactly as the row judgements
# (compile/_judged.py, measurement_shapes and compile/_measurement_rows.py) and distinct_codes
# (compile/_sources.py) spell it. tests/test_useless_runs.py fails when a stage gives a
# reason that is missing here.
SET_ASIDE_REASONS: dict[str, SetAsideReason] = {
    "missing patient_id": SetAsideReason(
        misread=True,
        tables=("patients",),
        hint="patient_id is empty; check that the patients file (or the site mapping's "
        "columns: patient_id) names the column that holds the patient identifier.",
    ),
    "orphan patient": SetAsideReason(
        misread=True,
        tables=_EVENTS,
        hint="these rows' patient_id matches no patient of the patients table; check that "
        "every table's patient_id column holds the same identifier written the same way "
        "(leading zeros, prefixes; ids take the patients table's type, integer or text, and "
        "an id that cannot be read as that type matches nobody), and that a site mapping "
        "names the right column; a patient set aside in the patients table (an unparseable date) "
        "leaves their rows orphans too.",
    ),
    "unparseable date": SetAsideReason(
        misread=True,
        tables=_ALL,
        hint="the date is empty or not written YYYY-MM-DD (patients: a birth, death, "
        "registration or deregistration date written but not readable; the patient is left "
        "out and their other rows count as orphans); if the site writes dates "
        'otherwise, describe them in a site mapping file (dates: "%d/%m/%Y", or excel for '
        "spreadsheet serial days), and check that the mapping names the right date column.",
    ),
    "unknown code system": SetAsideReason(
        misread=True,
        tables=("diagnoses", "prescriptions"),
        hint="code_system holds values other than ICD10 and ICD9; translate the site's "
        "labels in a site mapping file (values: {code_system: {ICD-10-CA: ICD10}}). In a FHIR "
        "export: no coding of the Condition has an ICD-10 or ICD-9-CM system, or no coding of "
        "the medication has the ATC system (http://www.whocc.no/atc).",
    ),
    "malformed code": SetAsideReason(
        misread=True,
        tables=("diagnoses", "prescriptions"),
        hint="the codes do not have the shape of their system (ICD-10, ICD-9, ATC); check "
        "that the code column (atc for prescriptions) holds codes and that code_system says "
        "which system each one is.",
    ),
    "category not recognised": SetAsideReason(
        misread=True,
        tables=("measurements",),
        hint="a coded measure's values are not the ones it knows; translate the site's "
        "values in a site mapping file (values:).",
    ),
    "no value": SetAsideReason(
        misread=True,
        tables=("measurements",),
        hint="neither value nor value_text holds anything; check which columns the file (or "
        "the site mapping) gives as value and value_text.",
    ),
    "value not numeric": SetAsideReason(
        misread=True,
        tables=("measurements",),
        hint="the values are not numbers; check the value and value_text columns and that "
        "decimals are written with a point.",
    ),
    "unit differs from value_text": SetAsideReason(
        misread=True,
        tables=("measurements",),
        hint="value_text carries a unit other than the unit column's; check which column "
        "holds the unit.",
    ),
    "unit not convertible": SetAsideReason(
        misread=True,
        tables=("measurements",),
        hint="the units are not ones their measure converts from; translate the site's unit "
        "spellings in a site mapping file (values: {unit: ...}) or check the unit column.",
    ),
    "implausible value": SetAsideReason(
        misread=True,
        tables=("measurements",),
        hint="the values lie outside their measure's plausible range, which usually means "
        "the unit column does not describe them; check the unit and value columns.",
    ),
    # Reasons only the FHIR reader gives (engine/_fhir.py, READER_REASONS), before any stage.
    "malformed line": SetAsideReason(
        misread=True,
        tables=_ALL,
        hint="lines of the NDJSON files are not JSON objects (cut off, two resources on one "
        "line, stray text); the quality log names the first file and line; a bulk-data file "
        "holds one resource per line.",
    ),
    "other resource type": SetAsideReason(
        misread=True,
        tables=_ALL,
        hint="lines hold a resource of another type than the file's name says (a Bundle, a "
        "Practitioner in Patient.ndjson); each bulk-data file holds one resource type and "
        "Bundles are not unpacked: export the resources themselves.",
    ),
    "no patient reference": SetAsideReason(
        misread=True,
        tables=_EVENTS,
        hint="the resources' subject is missing or does not refer to a Patient "
        "(Patient/<id>); check that the export holds the patients' own resources.",
    ),
    "missing date": SetAsideReason(
        misread=True,
        tables=_EVENTS,
        hint="the resources carry none of the date elements the reader takes a date from "
        "(see the README's FHIR section); check that the export keeps them.",
    ),
    "year-only date": SetAsideReason(
        misread=True,
        tables=_EVENTS,
        hint="the dates give a year only, too coarse for windows of days; an export that "
        "coarsens dates cannot be used for this study.",
    ),
    "stop date before start date": SetAsideReason(
        misread=True,
        tables=("prescriptions",),
        hint="the medication's stop date (boundsPeriod or validityPeriod end, "
        "effectivePeriod end) is before its start; check the export's dates.",
    ),
    "medication not found": SetAsideReason(
        misread=True,
        tables=("prescriptions",),
        hint="medicationReference points at no Medication, neither a contained one (#id) "
        "nor one in the Medication files; include the Medication resources in the export.",
    ),
    "entered in error": SetAsideReason(
        misread=False,
        tables=_EVENTS,
        hint="recorded as entered in error (status or verification status).",
    ),
    "refuted": SetAsideReason(
        misread=False, tables=("diagnoses",), hint="a diagnosis ruled out (verification status)."
    ),
    "not taken": SetAsideReason(
        misread=False, tables=("prescriptions",), hint="a medication the patient did not take."
    ),
    "cancelled": SetAsideReason(
        misread=False,
        tables=("encounters", "prescriptions", "measurements"),
        hint="an encounter, order or observation cancelled before it happened.",
    ),
    "after end of data": SetAsideReason(
        misread=False, tables=_EVENTS, hint="dated after the study's end_of_data."
    ),
    "after death": SetAsideReason(
        misread=False, tables=_EVENTS, hint="dated after the patient's death."
    ),
    "unknown measure": SetAsideReason(
        misread=False, tables=("measurements",), hint="a measure the tool does not know."
    ),
    "exact duplicate": SetAsideReason(
        misread=False, tables=_ALL, hint="a copy of a row counted once."
    ),
}


# A row whose patient_id is empty, or cannot be read as the patients table's id type (the
# views bind it with TRY_CAST), has no patient, so its copies are not exact duplicates: rows
# of different patients would otherwise meet on a NULL id and their date and code, and an
# extract whose ids all differ in type from the patients table's would show most of its rows
# as duplicates (a design reason, which never stops a build) instead of orphans. Such rows are
# all counted under their reason. So is a row the FHIR reader set aside (source_problem): two
# medications without an ATC coding, on the same day, are two drugs, not one and a copy.
_SUMMARY = """
SELECT
  reason,
  :table_name AS source_table,
  SUM(n_rows) - SUM(duplicates) AS distinct_rows,
  SUM(duplicates) AS duplicates,
  MIN(CASE WHEN reason <> 'used' THEN source_position END) AS first_position
FROM :classified
GROUP BY reason
"""

_LOG = """
SELECT
  source_table,
  CASE WHEN reason = 'used' THEN 'used' ELSE 'set aside' END AS outcome,
  CASE WHEN reason = 'used' THEN :used ELSE reason END AS reason,
  CAST(SUM(n) AS BIGINT) AS n_rows,
  MIN(first_position) AS first_position
FROM (
  SELECT source_table, reason, distinct_rows AS n, first_position FROM summary
  UNION ALL
  SELECT source_table, 'exact duplicate' AS reason, duplicates AS n,
    CAST(NULL AS BIGINT) AS first_position
  FROM summary
  WHERE duplicates > 0
) AS counted
GROUP BY source_table, reason
"""


def _classified(ctx: CompileContext, table: SourceTable) -> exp.Query:
    """A table's rows judged by its row-judgement rule, ready to be counted."""
    check = ctx.study.quality.exact_duplicates == "check"
    if table.name == "measurements":
        return measurements_for_log(check_duplicates=check, end_of_data=ctx.study.end_of_data)
    return judged_for_log(
        table,
        check_duplicates=check,
        end_of_data=ctx.study.end_of_data,
        raw_codes=raw_code_columns(table.name) if table.name in coded_tables(ctx) else None,
        unreadable_date=unreadable_patient_date() if table.name == "patients" else None,
    )


def quality_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """``rows_read``, and ``quality_log``: rows per table, outcome and reason."""
    tables = source_tables(ctx)
    read = [
        exp.select(
            value(t.name).as_("source_table"),
            exp.cast(exp.func("COUNT", exp.Star()), "BIGINT").as_("n_rows"),
        ).from_(t.relation)
        for t in tables
    ]
    checked = ctx.study.quality.exact_duplicates == "check"
    used = "used" if checked else "used (exact duplicates not checked)"
    summaries = [
        query(_SUMMARY, table_name=t.name, classified=_classified(ctx, t).subquery("c"))
        for t in tables
    ]
    return (
        Stage(
            names.ROWS_READ,
            _union(read),
            "rows read per extract table, counted on their own to check the quality log",
        ),
        Stage(
            names.QUALITY_LOG,
            query(_LOG, used=used).with_("summary", as_=_union(summaries)),
            "every extract row: used, or set aside with the first reason that applies",
        ),
    )


def _union(parts: list[exp.Query]) -> exp.Query:
    union = parts[0]
    for part in parts[1:]:
        union = union.union(part, distinct=False)
    return union
