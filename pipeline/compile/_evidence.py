"""Stages that turn usable rows into evidence events: (patient, evidence, date, rows that day).

``evidence`` holds each key's number (see :func:`evidence_number`), not its text.

Coded rows are matched by an equality join against one small literal table of prefixes for all
evidence of the study, so each table is scanned once however many definitions use it.
"""

from __future__ import annotations

import datetime as dt

from sqlglot import exp

from pipeline.codes import normalise_in, prefixes_in
from pipeline.compile import names
from pipeline.compile._context import CompileContext, evidence_id, evidence_number
from pipeline.compile._judged import same_raw_code
from pipeline.compile._measurements import measure_relations, measurement_passes
from pipeline.compile._plan import Stage
from pipeline.compile._sql import days_between, is_in, query, value, values_table
from pipeline.config import Evidence, ListUse, MeasurementEvidence

CodeRow = tuple[str, str, int, str | None, int | None, bool, bool]
_Group = tuple[str, bool, bool]

# Each distinct extract code is probed once per prefix length, so the join to the prefixes is
# an equality join. A code counts for a piece of evidence when it matches an included prefix
# (with the fewest days any of them needs; NULL: none) and no excluded one. A code the quality
# log sets aside (unknown system, malformed) matches nothing.
_CODE_MATCHES = """
SELECT
  c.source_table, c.raw_system, c.raw_code, c.raw_source, c.code_system, c.code, c.source,
  m.evidence,
  BOOL_OR(NOT m.is_exclusion) AS included,
  BOOL_OR(m.is_exclusion) AS excluded,
  CASE
    WHEN BOOL_OR(NOT m.is_exclusion AND m.min_days IS NULL) THEN NULL
    ELSE MIN(CASE WHEN NOT m.is_exclusion THEN m.min_days END)
  END AS min_days
FROM :found_codes AS c
CROSS JOIN :lengths
JOIN :codes ON m.code_system = c.code_system
  AND m.prefix = LEFT(c.code, l.prefix_length)
  AND (m.source IS NULL OR m.source = c.source)
WHERE c.problem IS NULL
GROUP BY
  c.source_table, c.raw_system, c.raw_code, c.raw_source, c.code_system, c.code, c.source,
  m.evidence
"""

# Every usable coded row with each evidence its code matches (once per distinct row when exact
# duplicates are checked). A row an exclusion matches is kept as not counting, for traces; a
# prescription shorter than the evidence needs is left out, unless an exclusion matches too.
# With an exact-match code list in the study, an exact code matches only a code of its length.
_CODE_MATCHES_EXACT = _CODE_MATCHES.replace(
    "WHERE c.problem IS NULL",
    "WHERE c.problem IS NULL AND (NOT m.exact OR LENGTH(c.code) = l.prefix_length)",
)

_CODED_MATCHES = """
SELECT
  e.patient_id, e.event_date, m.code_system, m.code, e.raw_code, m.source, e.duration_days,
  m.evidence, m.excluded OR NOT m.included AS excluded
FROM :rows AS e
JOIN :matches AS m ON :same_code
WHERE m.excluded OR m.min_days IS NULL OR e.duration_days >= m.min_days
"""

_CODED_EVIDENCE = """
SELECT patient_id, evidence, event_date, CAST(COUNT(*) AS INT) AS n_rows
FROM :rows
GROUP BY patient_id, evidence, event_date
"""

_MEASUREMENT_EVIDENCE = """
SELECT patient_id, :key AS evidence, obs_date AS event_date, CAST(COUNT(*) AS INT) AS n_rows
FROM :relation
WHERE measure = :measure AND :passes
GROUP BY patient_id, obs_date
"""

_ENCOUNTER_EVIDENCE = """
SELECT patient_id, :key AS evidence, encounter_date AS event_date,
  CAST(COUNT(DISTINCT COALESCE(encounter_type, '')) AS INT) AS n_rows
FROM :encounters
WHERE :types
GROUP BY patient_id, encounter_date
"""

# Each part is already one row per patient, evidence and day, and no two parts share an
# evidence key and day (a derived value exists only on days without a reported one).
_EVIDENCE_EVENTS = """
SELECT patient_id, evidence, event_date, CAST(:day AS INT) AS day, CAST(n_rows AS INT) AS n_rows
FROM :events
"""

_NO_EVENTS = """
SELECT patient_id, CAST(NULL AS INT) AS evidence, CAST(NULL AS DATE) AS event_date,
  1 AS n_rows
FROM :base
WHERE FALSE
"""


def _written_codes(ev: Evidence, uses: tuple[ListUse, ...]) -> dict[_Group, list[str]]:
    """The evidence's codes as written, by (system, is exclusion, exact match), lists included.

    A prefix-mode list's codes join the inline codes of their system, so a definition reads the
    same whether its codes are written inline or kept in a list.
    """
    groups: dict[_Group, list[str]] = {}
    if ev.diagnosis:
        inline = [("ICD9", ev.diagnosis.ICD9, False), ("ICD10", ev.diagnosis.ICD10, False)]
        if ev.diagnosis.exclude:
            inline += [
                ("ICD9", ev.diagnosis.exclude.ICD9, True),
                ("ICD10", ev.diagnosis.exclude.ICD10, True),
            ]
    elif ev.prescription:
        inline = [("ATC", ev.prescription.atc, False), ("ATC", ev.prescription.exclude, True)]
    else:
        return groups
    for system, codes, excluded in inline:
        groups.setdefault((system, excluded, False), []).extend(codes)
    for use in uses:
        code_list = use.code_list
        exact = code_list.match == "exact"
        groups.setdefault((code_list.system, use.excluded, exact), []).extend(code_list.included())
        groups.setdefault((code_list.system, True, exact), []).extend(code_list.excluded())
    return groups


def _code_rows(key: str, ev: Evidence, uses: tuple[ListUse, ...] = ()) -> list[CodeRow]:
    number = evidence_number(key)
    sources: tuple[str | None, ...] = (ev.diagnosis.source if ev.diagnosis else ()) or (None,)
    min_days = ev.prescription.min_days if ev.prescription else None
    groups = _written_codes(ev, uses)
    prefixes = {
        (system, excluded): prefixes_in(system, tuple(codes))
        for (system, excluded, exact), codes in groups.items()
        if not exact
    }
    rows: list[CodeRow] = []
    for (system, excluded, exact), codes in groups.items():
        if exact:
            covering = prefixes.get((system, excluded), [])
            found = {normalise_in(system, c) for c in codes}
            found = {c for c in found if not any(c.startswith(p) for p in covering)}
        else:
            found = set(prefixes[(system, excluded)])
        days = None if excluded else min_days
        rows += [
            (system, code, number, source, days, excluded, exact)
            for code in sorted(found)
            for source in sources
        ]
    return rows


def code_table_rows(ctx: CompileContext) -> list[CodeRow]:
    """Every (system, prefix, evidence, source, min_days, is_exclusion, exact) row, sorted."""
    lists = ctx.evidence_lists
    rows = {row for key, ev in ctx.evidence for row in _code_rows(key, ev, lists.get(key, ()))}
    return sorted(rows, key=lambda r: (r[0], r[1], r[2], r[3] or "", r[4] or 0, r[5], r[6]))


def _measurement_query(key: str, measurement: MeasurementEvidence, relation: str) -> exp.Query:
    return query(
        _MEASUREMENT_EVIDENCE,
        key=evidence_id(key),
        relation=exp.to_table(relation),
        measure=measurement.measure,
        passes=measurement_passes(measurement),
    )


def evidence_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """Stages that produce ``evidence_events`` for every piece of evidence of the study."""
    stages: list[Stage] = []
    parts: list[exp.Query] = []
    code_rows = code_table_rows(ctx)
    if code_rows:
        lengths = sorted({len(r[1]) for r in code_rows})
        columns = ["code_system", "prefix", "evidence", "source", "min_days", "is_exclusion"]
        exact = any(r[6] for r in code_rows)
        # Without an exact-match list the table and query are those of inline codes alone.
        table = [r if exact else r[:6] for r in code_rows]
        stages.append(
            Stage(
                names.CODES_TO_EVIDENCE,
                query(
                    _CODE_MATCHES_EXACT if exact else _CODE_MATCHES,
                    found_codes=exp.to_table(names.DISTINCT_CODES),
                    lengths=values_table("l", ["prefix_length"], [(n,) for n in lengths]),
                    codes=values_table("m", [*columns, "exact"] if exact else columns, table),
                ),
                "each distinct extract code with the evidence it matches or is excluded from",
            )
        )
        matches = query(
            _CODED_MATCHES,
            rows=exp.to_table(names.CODED_ROWS),
            matches=exp.to_table(names.CODES_TO_EVIDENCE),
            same_code=same_raw_code("e", "m"),
        )
        if ctx.study.quality.exact_duplicates == "check":
            matches = matches.distinct()  # exact duplicates count once
        stages.append(
            Stage(
                names.CODED_ROW_EVIDENCE,
                matches,
                "each usable diagnosis or prescription row with the evidence its code matches",
                kind="view",
            )
        )
        counted = (
            exp.select("patient_id", "event_date", "evidence")
            .from_(names.CODED_ROW_EVIDENCE)
            .where(exp.not_(exp.column("excluded")))
        )
        stages.append(
            Stage(
                names.CODED_EVIDENCE_DAYS,
                query(_CODED_EVIDENCE, rows=counted.subquery("m")),
                "matched rows counted per patient, evidence and day (kept only in evidence_events)",
                kind="view",
            )
        )
        parts.append(
            exp.select("patient_id", "evidence", "event_date", "n_rows").from_(
                names.CODED_EVIDENCE_DAYS
            )
        )
    for key, ev in ctx.evidence:
        if ev.measurement:
            for relation in measure_relations(ctx, ev.measurement.measure):
                parts.append(_measurement_query(key, ev.measurement, relation))
        if ev.encounter:
            types = (
                is_in(exp.column("encounter_type"), [t.lower() for t in ev.encounter.type])
                if ev.encounter.type
                else exp.true()
            )
            parts.append(
                query(
                    _ENCOUNTER_EVIDENCE,
                    key=evidence_id(key),
                    types=types,
                    encounters=exp.to_table(names.ENCOUNTER_ROWS),
                )
            )
    if not parts:  # every piece of evidence refers to another condition
        parts.append(query(_NO_EVENTS, base=exp.to_table(names.PATIENT_BASE)))
    union = parts[0]
    for part in parts[1:]:
        union = union.union(part, distinct=False)
    epoch = value(dt.date(1970, 1, 1))
    stages.append(
        Stage(
            names.EVIDENCE_EVENTS,
            query(
                _EVIDENCE_EVENTS,
                day=days_between(epoch, exp.column("event_date")),
                events=union.subquery("events"),
            ),
            "one row per patient, evidence and day, with the day number for windows",
        )
    )
    return tuple(stages)
