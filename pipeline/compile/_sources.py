"""Stages that read the extract once per table and keep only rows the study may use.

Each table's rows are judged once (``compile/_judged.py``): a row is usable when the reader
kept it, its date parses, its patient is in ``patients``, it is dated on or before the end of
data and not after the patient's death (and, for coded rows, its code is well formed in a
known system). The stages here read the usable rows of those judgements.
"""

from __future__ import annotations

from dataclasses import replace

from sqlglot import exp

from pipeline.codes import EXTRACT_PATTERNS, normalised_code_sql, read2_code_sql
from pipeline.compile import names
from pipeline.compile._context import CompileContext
from pipeline.compile._judged import event_judged, is_used, patients_judged
from pipeline.compile._plan import SourceTable, Stage
from pipeline.compile._sql import is_in, query, value, values_table
from pipeline.compile.names import judged_stage
from pipeline.config import Study
from pipeline.extract.schema import canonical_table

# The canonical tables as the plan reads them (pipeline/extract/schema.py defines them).
PATIENTS = canonical_table("patients").source
ENCOUNTERS = canonical_table("encounters").source
DIAGNOSES = canonical_table("diagnoses").source
PRESCRIPTIONS = canonical_table("prescriptions").source
MEASUREMENTS = canonical_table("measurements").source


# The patients table's dates. One written but unreadable sets the whole patient aside
# (quality log: ``unparseable date``): a birth date read as 1 July of birth_year, or a death
# read as no death, would give wrong ages and end reasons without a word.
PATIENT_DATES = canonical_table("patients").dates


def unreadable_patient_date() -> exp.Expression:
    """True for a patients row with a date that is written but cannot be read as one.

    An empty date (NULL, or only spaces in a CSV) is not unreadable: no death date means
    alive, no birth date means 1 July of birth_year. The cast is the one the events' dates
    get, so a patients row and an event row written alike are judged alike. Patient-level
    columns the file lacks are NULL in the source view, so they never count.
    """
    unreadable = []
    for name in PATIENT_DATES:
        column = exp.column(name)
        # COALESCE: a NULL here would make the whole test NULL, and NOT NULL drops the row.
        text = exp.Trim(this=exp.cast(column, "VARCHAR"))
        written = exp.func("COALESCE", text, value("")).neq(value(""))
        cast = exp.TryCast(this=column.copy(), to=exp.DataType.build("DATE"))
        unreadable.append(exp.and_(written, cast.is_(exp.null())))
    return exp.paren(exp.or_(*unreadable))


def source_tables(ctx: CompileContext) -> tuple[SourceTable, ...]:
    """The extract tables this study reads.

    The plan's sources are the seam through which a reader learns what the study reads before
    any row is read: ``diagnoses`` carries the code systems of the study's diagnosis evidence,
    ``measurements`` the LOINC codes of its measure registry. Only the FHIR reader uses them
    (a Condition coded twice, an Observation named by LOINC); the SQL of the stages is the
    same, and both come from files the manifest already hashes (definitions, measures).
    """
    tables = [PATIENTS, ENCOUNTERS]
    if ctx.uses("diagnosis"):
        tables.append(replace(DIAGNOSES, code_systems=diagnosis_systems(ctx)))
    if ctx.uses("prescription"):
        tables.append(PRESCRIPTIONS)
    if ctx.measures:
        tables.append(replace(MEASUREMENTS, measure_codes=measure_codes(ctx)))
    return tuple(tables)


def diagnosis_systems(ctx: CompileContext) -> tuple[str, ...]:
    """The code systems the study's diagnosis evidence reads (inline codes and lists), sorted."""
    systems: set[str] = set()
    for key, ev in ctx.evidence:
        if ev.diagnosis is None:
            continue
        for codes in (ev.diagnosis, ev.diagnosis.exclude):
            if codes is not None:
                systems.update(s for s in ("ICD9", "ICD10") if getattr(codes, s))
        systems.update(use.code_list.system for use in ctx.evidence_lists.get(key, ()))
    return tuple(sorted(systems - {"ATC"}))


def measure_codes(ctx: CompileContext) -> tuple[tuple[str, str], ...]:
    """Every (LOINC code, measure) the study's measure registry declares, sorted.

    The whole registry, not only the measures the study reads: an observation of a measure the
    study does not read is then counted in the quality log as such, not as an unknown code.
    """
    found = {
        (code, name)
        for name, measure in ctx.registry.measures.items()
        for system, code in measure.codes
        if system == "LOINC"
    }
    return tuple(sorted(found))


# Only the rows ``patients_judged`` finds usable.
_PATIENT_BASE = """
SELECT DISTINCT
  patient_id,
  COALESCE(
    TRY_CAST(birth_date AS DATE), MAKE_DATE(TRY_CAST(birth_year AS INT), 7, 1)
  ) AS birth_date,
  NULLIF(UPPER(TRIM(CAST(sex AS VARCHAR))), '') AS sex,
  TRY_CAST(death_date AS DATE) AS death_date,
  NULLIF(TRIM(CAST(practice_id AS VARCHAR)), '') AS practice_id,
  TRY_CAST(registration_date AS DATE) AS registration_date,
  TRY_CAST(deregistration_date AS DATE) AS deregistration_date
FROM :judged
WHERE :used
"""

_PATIENT_DUPLICATES = """
SELECT patient_id, COUNT(*) AS n_rows
FROM :base
GROUP BY patient_id
HAVING COUNT(*) > 1
ORDER BY patient_id
LIMIT 5
"""

_ENCOUNTER_ROWS = """
SELECT
  patient_id,
  row_date AS encounter_date,
  LOWER(TRIM(CAST(encounter_type AS VARCHAR))) AS encounter_type
FROM :judged
WHERE :used
"""

# The first encounter in the index window is found in the same pass when the study indexes on it.
_ENCOUNTER_SUMMARY = """
SELECT
  patient_id,
  MIN(encounter_date) AS first_encounter,
  MAX(encounter_date) AS last_encounter,
  MIN(CASE WHEN :in_window THEN encounter_date END) AS first_in_window
FROM :rows
GROUP BY patient_id
"""

# Codes are read raw: every distinct (system, code, source) of the extract is normalised and
# judged once, in ``distinct_codes``, and rows are joined to it on their raw values.
_CODED_ROWS = """
SELECT patient_id, row_date AS event_date, source_table, raw_system, raw_code, raw_source,
  duration_days
FROM :judged
WHERE :used
"""

_DISTINCT_CODES = """
SELECT
  source_table, raw_system, raw_code, raw_source, code_system, code, source,
  :problem AS problem
FROM (
  SELECT
    source_table, raw_system, raw_code, raw_source,
    CASE
      WHEN source_table = 'prescriptions' THEN 'ATC' ELSE UPPER(TRIM(raw_system))
    END AS code_system,
    :code AS code,
    LOWER(TRIM(raw_source)) AS source
  FROM :found
) AS c
"""


# Local product codes (``local_codes: {products: ...}``) are looked up once per distinct code.
_MAPPED_PRODUCTS = """
SELECT f.*, m.atc AS mapped_code
FROM :found
LEFT JOIN :products ON f.source_table = 'prescriptions' AND TRIM(f.raw_code) = m.local_code
"""


def raw_code_columns(table: str) -> dict[str, exp.Expression]:
    """A coded table's raw system, code and source as text, the keys of ``distinct_codes``."""
    text = {
        name: exp.cast(exp.column(name), "VARCHAR")
        for name in ("code_system", "code", "source", "atc")
    }
    none = exp.cast(exp.null(), "VARCHAR")
    if table == "diagnoses":
        return {
            "raw_system": text["code_system"],
            "raw_code": text["code"],
            "raw_source": text["source"],
        }
    return {"raw_system": none, "raw_code": text["atc"], "raw_source": none.copy()}


def _code_problem(systems: tuple[str, ...]) -> exp.Expression:
    """What is wrong with a distinct extract code: unknown system, malformed code, or NULL.

    The diagnosis systems known are ICD-9 and ICD-10, and the others the study's code lists
    read (SNOMED, READ2, ICPC2): a row in a system no evidence can match is set aside as an
    unknown code system. The shapes are those definitions are checked against, on the
    normalised code (``EXTRACT_PATTERNS``); an extract's SNOMED CT identifier is checked for
    its digits only, and one with a wrong check digit matches no list.
    """
    # An empty or missing code or system is malformed or unknown, never used.
    system = exp.func("COALESCE", exp.column("code_system"), value(""))
    code = exp.func("COALESCE", exp.column("code"), value(""))

    def malformed(name: str) -> exp.Expression:
        return exp.not_(exp.func("REGEXP_MATCHES", code.copy(), value(EXTRACT_PATTERNS[name])))

    atc = exp.Case().when(malformed("ATC"), value("malformed code"))
    known = ("ICD9", "ICD10", *systems)
    case = (
        exp.Case()
        .when(exp.column("source_table").eq(value("prescriptions")), atc)
        .when(
            exp.not_(system.copy().isin(*(value(s) for s in known))),
            value("unknown code system"),
        )
    )
    for name in known:
        case = case.when(exp.and_(system.copy().eq(name), malformed(name)), value("malformed code"))
    return case


def _normalised_code(systems: tuple[str, ...]) -> exp.Expression:
    """The extract code as its system compares it (Read v2 keeps its case)."""
    code = normalised_code_sql(exp.column("raw_code"))
    if "READ2" not in systems:
        return code
    is_read2 = exp.Upper(this=exp.Trim(this=exp.column("raw_system"))).eq(value("READ2"))
    return exp.Case().when(is_read2, read2_code_sql(exp.column("raw_code"))).else_(code)


def _distinct_codes(ctx: CompileContext) -> exp.Query:
    found = []
    for table in coded_tables(ctx):
        columns = [c.as_(name) for name, c in raw_code_columns(table).items()]
        relation = f"src_{table}"
        found.append(
            exp.select(value(table).as_("source_table"), *columns).from_(relation).distinct()
        )
    union = found[0] if len(found) == 1 else found[0].union(found[1], distinct=False)
    code = _normalised_code(ctx.list_systems)
    products = ctx.local_codes.products
    if products and "prescriptions" in coded_tables(ctx):
        # A local product code of the study's table is judged as the ATC code it stands for.
        union = query(
            _MAPPED_PRODUCTS,
            found=union.subquery("f"),
            products=values_table("m", ["local_code", "atc"], list(products)),
        )
        code = exp.func("COALESCE", exp.column("mapped_code"), code)
    return query(
        _DISTINCT_CODES,
        found=union.subquery("found"),
        code=code,
        problem=_code_problem(ctx.list_systems),
    )


def source_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """Each table's row judgement, then the typed, usable rows later passes read."""
    study = ctx.study
    patients = judged_stage(PATIENTS.name)
    encounters = judged_stage(ENCOUNTERS.name)
    stages = [
        patients_judged(PATIENTS, unreadable_patient_date()),
        Stage(
            names.PATIENT_BASE,
            query(_PATIENT_BASE, judged=exp.to_table(patients), used=is_used()),
            "one typed row per patient: birth date (1 July when only the year is known), sex; "
            "a patient with a written but unreadable date is left out",
        ),
        Stage(
            names.PATIENT_DUPLICATES,
            query(_PATIENT_DUPLICATES, base=exp.to_table(names.PATIENT_BASE)),
            "patients must be listed once",
            kind="check",
            failure="the patients table lists the same patient_id with different values",
        ),
        event_judged(ENCOUNTERS, end_of_data=study.end_of_data),
        Stage(
            names.ENCOUNTER_ROWS,
            query(_ENCOUNTER_ROWS, judged=exp.to_table(encounters), used=is_used()),
            "usable encounters: a readable date, a known patient, not after death or end of data",
            kind="view",
        ),
        Stage(
            names.ENCOUNTER_SUMMARY,
            query(
                _ENCOUNTER_SUMMARY,
                in_window=_index_window(study),
                rows=exp.to_table(names.ENCOUNTER_ROWS),
            ),
            "first and last usable encounter per patient (and the first in the index window)",
        ),
    ]
    if coded_tables(ctx):
        stages.append(
            Stage(
                names.DISTINCT_CODES,
                _distinct_codes(ctx),
                "each distinct code of the extract, normalised, with what is wrong with it",
            )
        )
    tables = {"diagnoses": DIAGNOSES, "prescriptions": PRESCRIPTIONS}
    for name in coded_tables(ctx):
        stages.append(
            event_judged(
                tables[name], end_of_data=study.end_of_data, raw_codes=raw_code_columns(name)
            )
        )
    if ctx.uses_coded_events:
        parts = [
            query(_CODED_ROWS, judged=exp.to_table(judged_stage(name)), used=is_used())
            for name in coded_tables(ctx)
        ]
        rows = parts[0] if len(parts) == 1 else parts[0].union(parts[1], distinct=False)
        stages.append(
            Stage(
                names.CODED_ROWS,
                rows,
                "usable diagnosis and prescription rows with their raw codes",
                kind="view",
            )
        )
    return tuple(stages)


def _index_window(study: Study) -> exp.Expression:
    rule = study.index.first_encounter
    if rule is None:
        return exp.false()
    start, end = rule.between
    inside = exp.column("encounter_date").between(value(start), value(end))
    if rule.type:
        inside = exp.and_(
            inside, is_in(exp.column("encounter_type"), [t.lower() for t in rule.type])
        )
    return inside


def coded_tables(ctx: CompileContext) -> tuple[str, ...]:
    """The coded extract tables (diagnoses, prescriptions) this study reads."""
    used = (("diagnoses", ctx.uses("diagnosis")), ("prescriptions", ctx.uses("prescription")))
    return tuple(name for name, is_used in used if is_used)


def _coded_sources(ctx: CompileContext) -> tuple[str, ...]:
    return tuple(f"src_{name}" for name in coded_tables(ctx))
