"""Stages that read measurements: parse, convert to canonical units, check, derive.

Every measurement row gets either a usable canonical value or a ``problem`` saying why not, so
nothing is dropped silently. ``value`` wins; ``value_text`` is read only when ``value`` is empty,
and only what is unambiguous is parsed: ``6.5``, ``6,5`` (a decimal comma with one or two
decimals), ``<5`` or ``>90`` (the qualifier is kept), ``6.5 %`` (the unit must agree with the
unit column when both are given). Units the registry does not list are never guessed.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._context import CompileContext
from pipeline.compile._measurement_rows import (
    copies_table,
    measurement_rows,
    measurements_judged,
    usable_values,
)
from pipeline.compile._plan import Stage
from pipeline.compile._sources import MEASUREMENTS
from pipeline.compile._sql import (
    age_in_years,
    expression,
    is_in,
    near_index,
    query,
    value,
    values_table,
)
from pipeline.config import MeasurementEvidence
from pipeline.measures import DERIVED_FROM, SAME_DAY_INPUTS, Threshold

# No backslashes: the pattern must mean the same in every engine's string literals.
READING_PATTERN = "^(<=|>=|<|>)?[ ]*([0-9]+([.,][0-9]+)?)[ ]*(.*)$"
DECIMAL_COMMA_PATTERN = "^[0-9]+,[0-9]{1,2}$"

# Measurements are judged once per distinct shape, not per row (issue 24): the measure, unit,
# value and value_text of a row decide its reading, unit conversion and plausibility, and an
# extract of millions of rows holds a few thousand such combinations (lab values are written
# to a fixed precision). ``measurement_shapes`` parses and judges those; each row then meets
# its shape by an equality join on the raw values, as coded rows meet ``distinct_codes``. Only
# what depends on the row itself (its patient and date) is judged per row.
#
# A numeric value is never missing, so the text test of ``value_missing`` (a cast of every
# number to text) runs only on the few other shapes. For the same reason ``value_text`` is
# parsed only where ``value`` is missing: extracts that write every number twice (value and
# value_text) would otherwise run three regular expressions on text that is never read.
_MEASUREMENT_SHAPES = """
WITH read AS (
  SELECT
    key_measure,
    key_unit,
    key_value,
    key_value_text,
    :measure_name AS measure,
    TRY_CAST(key_value AS DOUBLE) AS value_number,
    CASE
      WHEN TRY_CAST(key_value AS DOUBLE) IS NOT NULL THEN FALSE
      ELSE NULLIF(TRIM(CAST(key_value AS VARCHAR)), '') IS NULL
    END AS value_missing,
    NULLIF(TRIM(CAST(key_value AS VARCHAR)), '') AS value_given,
    NULLIF(TRIM(CAST(key_value_text AS VARCHAR)), '') AS text_given,
    NULLIF(TRIM(CAST(key_unit AS VARCHAR)), '') AS unit_given
  FROM :shapes
), split AS (
  SELECT
    *,
    CASE WHEN value_missing THEN NULLIF(REGEXP_EXTRACT(text_given, :pattern, 1), '') END
      AS text_qualifier,
    CASE WHEN value_missing THEN NULLIF(REGEXP_EXTRACT(text_given, :pattern, 2), '') END
      AS text_number,
    CASE WHEN value_missing THEN NULLIF(TRIM(REGEXP_EXTRACT(text_given, :pattern, 4)), '') END
      AS text_unit
  FROM read
), parsed AS (
  SELECT
    key_measure,
    key_unit,
    key_value,
    key_value_text,
    measure,
    CASE
      WHEN NOT value_missing THEN value_number
      WHEN text_number LIKE '%,%' AND REGEXP_MATCHES(text_number, :decimal_comma)
        THEN TRY_CAST(REPLACE(text_number, ',', '.') AS DOUBLE)
      WHEN text_number LIKE '%,%' THEN NULL
      ELSE TRY_CAST(text_number AS DOUBLE)
    END AS reading,
    CASE WHEN value_missing THEN text_qualifier END AS qualifier,
    COALESCE(unit_given, CASE WHEN value_missing THEN text_unit END) AS unit,
    value_missing AND text_unit IS NOT NULL AND unit_given IS NOT NULL
      AND text_unit <> unit_given AS unit_conflict,
    value_missing AND text_given IS NULL AS empty,
    CASE WHEN value_missing THEN LOWER(text_given) END AS category,
    value_given,
    text_given,
    unit_given
  FROM split
)
SELECT
  r.key_measure,
  r.key_unit,
  r.key_value,
  r.key_value_text,
  r.measure,
  r.qualifier,
  CASE WHEN k.is_coded THEN r.category END AS category,
  r.value_given AS raw_value,
  r.text_given AS raw_value_text,
  r.unit_given AS raw_unit,
  u.factor * r.reading / u.divisor + u.offset_value AS value,
  CASE
    WHEN k.measure IS NULL THEN 'unknown measure'
    WHEN k.is_coded AND (r.category IS NULL OR NOT (:known_category))
      THEN 'category not recognised'
    WHEN k.is_coded THEN NULL
    WHEN r.empty THEN 'no value'
    WHEN r.reading IS NULL THEN 'value not numeric'
    WHEN r.unit_conflict THEN 'unit differs from value_text'
    WHEN u.measure IS NULL THEN 'unit not convertible'
    WHEN u.factor * r.reading / u.divisor + u.offset_value NOT BETWEEN u.low AND u.high
      THEN 'implausible value'
  END AS problem
FROM parsed AS r
LEFT JOIN :known ON k.measure = r.measure
LEFT JOIN :units ON u.measure = r.measure AND u.unit = r.unit
"""

# Each distinct shape of the extract's measurement rows, the keys ``measurement_shapes`` and
# the rows are joined on.
_DISTINCT_SHAPES = """
SELECT DISTINCT
  measure AS key_measure,
  unit AS key_unit,
  value AS key_value,
  value_text AS key_value_text
FROM :source
"""

# Local lab test codes (``local_codes: {lab_tests: ...}``), looked up on the distinct shapes.
_MAPPED_LAB_TESTS = """
SELECT g.*, t.measure AS mapped_measure
FROM :shapes
LEFT JOIN :lab_tests ON TRIM(CAST(g.key_measure AS VARCHAR)) = t.local_code
"""

_COMPARISONS = {
    "at_least": exp.GTE,
    "above": exp.GT,
    "below": exp.LT,
    "at_most": exp.LTE,
}

# A value reported as "<x" or ">x" meets a threshold only when the comparison is certain:
# "<x" is below t when x <= t; ">x" is at least t when x >= t; otherwise it is not counted.
_CERTAIN_WITH_QUALIFIER = {
    "below": {"<": exp.LTE, "<=": exp.LT},
    "at_most": {"<": exp.LTE, "<=": exp.LTE},
    "above": {">": exp.GTE, ">=": exp.GT},
    "at_least": {">": exp.GTE, ">=": exp.GTE},
}


def _meets(threshold: Threshold) -> exp.Expression:
    value_col, limit = exp.column("value"), value(threshold.canonical_value)
    case = exp.Case().when(
        exp.column("qualifier").is_(exp.null()),
        _COMPARISONS[threshold.comparison](this=value_col, expression=limit),
    )
    for qualifier, compare in _CERTAIN_WITH_QUALIFIER[threshold.comparison].items():
        case = case.when(
            exp.column("qualifier").eq(qualifier),
            compare(this=value_col.copy(), expression=limit.copy()),
        )
    return case.else_(exp.false())


def measurement_passes(measurement: MeasurementEvidence) -> exp.Expression:
    """Whether a value (columns ``value``, ``qualifier``, ``category``) meets the evidence."""
    if measurement.category:
        return is_in(exp.column("category"), measurement.category)
    return exp.and_(*(_meets(t) for t in measurement.thresholds()))


# eGFR from creatinine by CKD-EPI 2021 (Inker et al., N Engl J Med 2021;385:1737), age in
# completed years on the measurement date. Only exact creatinine values (no < or >), and only
# on days without a usable reported eGFR, which wins.
_DERIVED_EGFR = """
SELECT patient_id, obs_date, 'egfr' AS measure, egfr AS value, CAST(NULL AS VARCHAR) AS qualifier,
  CAST(NULL AS VARCHAR) AS category, TRUE AS derived
FROM (
  SELECT
    c.patient_id,
    c.obs_date,
    142
      * POWER(LEAST(c.value / k.kappa, 1), k.alpha)
      * POWER(GREATEST(c.value / k.kappa, 1), -1.2)
      * POWER(0.9938, :age)
      * k.female_factor AS egfr
  FROM :kept AS c
  JOIN :base AS p ON p.patient_id = c.patient_id
  JOIN (VALUES ('F', 0.7, -0.241, 1.012), ('M', 0.9, -0.302, 1.0))
    AS k(sex, kappa, alpha, female_factor) ON k.sex = p.sex
  LEFT JOIN (
    SELECT DISTINCT patient_id, obs_date FROM :kept WHERE measure = 'egfr'
  ) AS r ON r.patient_id = c.patient_id AND r.obs_date = c.obs_date
  WHERE c.measure = 'creatinine' AND c.qualifier IS NULL AND r.patient_id IS NULL
    AND p.birth_date IS NOT NULL
) AS d
WHERE egfr BETWEEN :low AND :high
"""

# BMI from weight and the latest height ever recorded (demo spec §5,
# definitions/studies/orvane_multimorbidity.md), on days without a usable
# reported BMI; several weights on one day each give a BMI.
_DERIVED_BMI = """
SELECT patient_id, obs_date, 'bmi' AS measure, bmi AS value, CAST(NULL AS VARCHAR) AS qualifier,
  CAST(NULL AS VARCHAR) AS category, TRUE AS derived
FROM (
  SELECT w.patient_id, w.obs_date, w.value / POWER(h.height_cm / 100, 2) AS bmi
  FROM :kept AS w
  JOIN (
    SELECT patient_id, AVG(value) AS height_cm
    FROM (
      SELECT patient_id, value, obs_date,
        MAX(obs_date) OVER (PARTITION BY patient_id) AS last_date
      FROM :kept
      WHERE measure = 'height' AND qualifier IS NULL
    ) AS heights
    WHERE obs_date = last_date
    GROUP BY patient_id
  ) AS h ON h.patient_id = w.patient_id
  LEFT JOIN (
    SELECT DISTINCT patient_id, obs_date FROM :kept WHERE measure = 'bmi'
  ) AS r ON r.patient_id = w.patient_id AND r.obs_date = w.obs_date
  WHERE w.measure = 'weight' AND w.qualifier IS NULL AND r.patient_id IS NULL
) AS d
WHERE bmi BETWEEN :low AND :high
"""


def _shapes(ctx: CompileContext) -> exp.Query:
    """Every distinct shape (measure, unit, value, value_text) parsed, converted and judged.

    What a row's shape decides (its measure, reading, qualifier, unit and plausibility) is
    decided here once per shape; ``measurement_rows`` adds what depends on the row.
    """
    measures = ctx.registry.measures
    known = values_table(
        "k",
        ["measure", "is_coded"],
        [(m.name, m.is_coded) for m in sorted(measures.values(), key=lambda m: m.name)],
    )
    units = values_table(
        "u",
        ["measure", "unit", "factor", "divisor", "offset_value", "low", "high"],
        ctx.registry.conversion_rows(),
    )
    categories = sorted({(m.name, c) for m in measures.values() for c in m.categories})
    known_category = exp.or_(
        *(
            exp.and_(exp.column("measure", "r").eq(name), exp.column("category", "r").eq(value))
            for name, value in categories
        )
    )
    shapes = query(_DISTINCT_SHAPES, source=exp.to_table(MEASUREMENTS.relation))
    name = expression("LOWER(TRIM(CAST(key_measure AS VARCHAR)))")
    if ctx.local_codes.lab_tests:
        # A local lab code of the study's table is judged as the measure it names.
        shapes = query(
            _MAPPED_LAB_TESTS,
            shapes=shapes.subquery("g"),
            lab_tests=values_table("t", ["local_code", "measure"], list(ctx.local_codes.lab_tests)),
        )
        name = exp.func("COALESCE", exp.column("mapped_measure"), name)
    return query(
        _MEASUREMENT_SHAPES,
        measure_name=name,
        pattern=READING_PATTERN,
        decimal_comma=DECIMAL_COMMA_PATTERN,
        known=known,
        units=units,
        known_category=known_category,
        shapes=shapes.subquery("d"),
    )


def _kept_rows(ctx: CompileContext) -> exp.Expression | None:
    """Which usable rows ``measurement_values`` keeps: those some later stage can read.

    None keeps every row. A measure keeps the rows its evidence can count (all dates: a
    look-back may reach any of them) and those its covariates' windows can reach from any
    possible index date; the rest (most blood pressures, say) would only be stored and never
    read. The dates are fixed by the study, so no row waits on a join to the index dates.

    A derived measure read only in windows keeps its windows, and so do the inputs it reads on
    the same day (weight for BMI): a reported value wins over a derived one on its day, so both
    are needed on the same days. Inputs read whatever their date (height) are kept whole. A
    derived measure that is evidence, or whose same-day inputs are read for themselves too, is
    kept whole with all its inputs: a threshold on derived values says nothing of the days
    their inputs fall on.
    """
    direct: dict[str, list[exp.Expression]] = {m: [] for m in ctx.measures}
    evidence_on: set[str] = set()
    for _, ev in ctx.evidence:
        if ev.measurement:
            direct[ev.measurement.measure].append(measurement_passes(ev.measurement))
            evidence_on.add(ev.measurement.measure)
    for covariate in ctx.study.covariates.values():
        measure = covariate.latest or covariate.mean or covariate.minimum or covariate.maximum
        if measure:
            direct[measure].append(
                near_index(exp.column("obs_date"), ctx.index_range, covariate.span)
            )
    demands: dict[str, list[exp.Expression] | None] = dict(direct)
    for derived, sources in DERIVED_FROM.items():
        if derived not in ctx.measures:
            continue
        same_day = SAME_DAY_INPUTS.get(derived, ())
        if derived in evidence_on or any(direct[s] for s in same_day):
            demands.update(dict.fromkeys((derived, *sources)))
            continue
        for source in sources:
            demands[source] = [w.copy() for w in direct[derived]] if source in same_day else None
    whole = sorted(m for m, wanted in demands.items() if not wanted)
    if len(whole) == len(demands):
        return None
    kept = [is_in(exp.column("measure"), whole)] if whole else []
    for measure, wanted in sorted(demands.items()):
        if wanted:
            kept.append(exp.and_(exp.column("measure").eq(measure), exp.or_(*wanted)))
    return exp.or_(*kept)


def _values_stage(ctx: CompileContext) -> Stage:
    kept = _kept_rows(ctx)
    values = usable_values(
        wanted=is_in(exp.column("measure"), ctx.measures),
        kept=kept,
        check_duplicates=ctx.study.quality.exact_duplicates == "check",
        end_of_data=ctx.study.end_of_data,
    )
    if kept is None:
        return Stage(
            names.MEASUREMENT_VALUES,
            values,
            "usable values of the measures the study reads, in canonical units",
        )
    return Stage(
        names.MEASUREMENT_VALUES,
        values,
        "usable values some stage can read, in canonical units: those that are evidence, "
        "those near a possible index date, and what derived values need",
    )


def measurement_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """Shapes, every row judged (two views), and the usable values (a table).

    ``measurement_rows`` (every distinct row with its raw values, for ``explain``) and
    ``measurements_judged`` (every row once, for the quality log and contact) are views: no
    reader needs tens of millions of judged rows stored. ``measurement_values`` reads only
    the rows of usable shapes (compile/_measurement_rows.py).
    """
    if not ctx.measures:
        return ()
    check = ctx.study.quality.exact_duplicates == "check"
    end = ctx.study.end_of_data
    stages = [
        Stage(
            names.MEASUREMENT_SHAPES,
            _shapes(ctx),
            "each distinct measure, unit, value and value_text of the extract parsed, converted "
            "and judged once",
        ),
        Stage(
            names.MEASUREMENT_ROWS,
            measurement_rows(check_duplicates=check, end_of_data=end),
            "every distinct measurement row with its shape's value and what stops its use",
            kind="view",
        ),
        Stage(
            names.MEASUREMENTS_JUDGED,
            measurements_judged(end),
            "every measurement row once, parsed, converted and judged: quality log and contact",
            kind="view",
        ),
    ]
    if check:
        stages.append(
            Stage(
                names.MEASUREMENT_COPIES,
                copies_table(),
                "the distinct measurement rows whose hash another row shares (the only ones "
                "that can have exact copies), with their copies",
            )
        )
    stages.append(_values_stage(ctx))
    if "egfr" in ctx.measures:
        low, high = ctx.registry["egfr"].plausible
        age = age_in_years(birth=exp.column("birth_date", "p"), on=exp.column("obs_date", "c"))
        stages.append(
            Stage(
                names.DERIVED_EGFR,
                query(
                    _DERIVED_EGFR,
                    kept=exp.to_table(names.MEASUREMENT_VALUES),
                    base=exp.to_table(names.PATIENT_BASE),
                    age=age,
                    low=low,
                    high=high,
                ),
                "eGFR derived from creatinine by CKD-EPI 2021 where none was reported that day",
            )
        )
    if "bmi" in ctx.measures:
        low, high = ctx.registry["bmi"].plausible
        stages.append(
            Stage(
                names.DERIVED_BMI,
                query(
                    _DERIVED_BMI, kept=exp.to_table(names.MEASUREMENT_VALUES), low=low, high=high
                ),
                "BMI from weight and the latest height where none was reported that day",
            )
        )
    return tuple(stages)


def measure_relations(ctx: CompileContext, measure: str) -> tuple[str, ...]:
    """The stages holding values of ``measure``: reported, and derived where it can be."""
    if measure in DERIVED_FROM and measure in ctx.measures:
        return (names.MEASUREMENT_VALUES, names.derived_stage(measure))
    return (names.MEASUREMENT_VALUES,)
