"""``ascertain codes``: which extract codes each piece of evidence of a study matched.

For every diagnosis and prescription evidence the study reads (its outcomes, covariates, steps
and scores), the audit lists the extract codes that counted, with their rows, patients, first
and last year and rows per calendar year (a code that stops in 2017 while its neighbour starts
is coding drift); the codes of its lists and inline codes that no usable row carries; and its
near misses: extract codes beside the matched ones (the same parent, see :func:`parent_of`)
that the evidence does not name, ranked by patients. The counting runs on the engine, from the
study's own ``codes_to_evidence`` stage, so "matched" means what the build means
(:mod:`pipeline.compile._audit`); what is computed here in Python works on a few hundred codes.

Every count is patient-level detail (:data:`PATIENT_LEVEL`) unless written with ``release``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline.codes import descendants, normalise_in, prefixes_in, read_hierarchy
from pipeline.compile import compile_study, names
from pipeline.compile._audit import audit_plan
from pipeline.compile._context import CompileContext, evidence_number
from pipeline.config import Evidence, ListUse, load_study
from pipeline.errors import AscertainError
from pipeline.extract import open_extract
from pipeline.outputs._ownership import CODES, check_folder
from pipeline.workflows.prepare import BuildOptions, local_inputs, prepare, resolve_extract

PATIENT_LEVEL = (
    "Patient-level detail for use inside the secure environment: exact counts of rows and "
    "patients per code and year, small ones included. Do not release it; write a suppressed "
    "copy with --release."
)
INLINE = "(inline)"
"""The ``list`` column of codes written in the definition itself."""


@dataclass(frozen=True)
class Entry:
    """One code an evidence names (a list's row or an inline code), normalised."""

    list_name: str
    system: str
    code: str
    term: str
    exact: bool
    written: str

    def covers(self, system: str, code: str) -> bool:
        """Whether an extract code (normalised) falls under this entry."""
        if system != self.system:
            return False
        return code == self.code if self.exact else code.startswith(self.code)


@dataclass(frozen=True)
class EvidenceCodes:
    """What one coded evidence names: its entries, and the SNOMED CT hierarchy its lists give."""

    key: str
    table: str
    entries: tuple[Entry, ...]
    children: dict[str, set[str]] = field(default_factory=dict)
    widened: dict[str, str] = field(default_factory=dict)

    @property
    def definition(self) -> str:
        """The condition (or ``@covariate`` and the like for the study's own evidence)."""
        return self.key.split(".", 1)[0]

    @property
    def evidence(self) -> str:
        """The evidence's name within its definition."""
        return self.key.split(".", 1)[1]


@dataclass
class CodeAudit:
    """The audit's tables, as lists of rows (dicts keyed by the CSV columns), sorted."""

    study: str
    threshold: int
    matched: list[dict[str, Any]]
    by_year: list[dict[str, Any]]
    unseen: list[dict[str, Any]]
    near_misses: list[dict[str, Any]]
    totals: list[dict[str, Any]]


def _entries(ev: Evidence, uses: tuple[ListUse, ...]) -> list[Entry]:
    """Every included code an evidence names, inline codes first, then each list in order."""
    inline: list[tuple[str, tuple[str, ...]]] = []
    if ev.diagnosis:
        inline = [("ICD9", ev.diagnosis.ICD9), ("ICD10", ev.diagnosis.ICD10)]
    elif ev.prescription:
        inline = [("ATC", ev.prescription.atc)]
    found = [
        Entry(INLINE, system, prefix, "", exact=False, written=prefix)
        for system, codes in inline
        for prefix in prefixes_in(system, tuple(codes))
    ]
    for use in uses:
        if use.excluded:
            continue
        code_list = use.code_list
        for row in code_list.codes:
            if not row.excluded:
                code = normalise_in(code_list.system, row.code)
                exact = code_list.match == "exact"
                entry = Entry(code_list.name, code_list.system, code, row.term, exact, row.code)
                found.append(entry)
    return found


def _hierarchy(uses: tuple[ListUse, ...]) -> tuple[dict[str, set[str]], dict[str, str]]:
    """The SNOMED CT hierarchy the evidence's lists name, and which list widened each concept."""
    children: dict[str, set[str]] = {}
    widened: dict[str, str] = {}
    for use in uses:
        header = use.code_list.header
        if use.excluded or header.descendants_from is None:
            continue
        file = use.code_list.header_file.parent / header.descendants_from
        for parent, kids in read_hierarchy(file).items():
            children.setdefault(parent, set()).update(kids)
        for code in use.code_list.widened:
            widened.setdefault(code, use.code_list.name)
    return children, widened


def coded_evidence(ctx: CompileContext) -> list[EvidenceCodes]:
    """The study's diagnosis and prescription evidence, in the plan's order."""
    found = []
    for key, ev in ctx.evidence:
        if not (ev.diagnosis or ev.prescription):
            continue
        uses = ctx.evidence_lists.get(key, ())
        children, widened = _hierarchy(uses)
        table = "diagnoses" if ev.diagnosis else "prescriptions"
        found.append(EvidenceCodes(key, table, tuple(_entries(ev, uses)), children, widened))
    return found


def parent_of(system: str, code: str, parents: dict[str, set[str]]) -> set[str]:
    """The parents a near miss must share with a matched code (normalised codes).

    ICD-10 and ICD-9-CM: the three-character category (four for ICD-9-CM E codes, whose
    categories are E800-E999; from memory). Read v2: the code one level up, one character
    shorter (the hierarchy is the code's positions). ICPC-2: the chapter letter and its
    component, symptoms 01-29, process 30-69, diagnoses 70-99 (from memory). ATC: the level
    above (7 characters -> 5 -> 4 -> 3 -> 1). SNOMED CT: the concept's parents in the
    hierarchy the evidence's lists give; none without one.
    """
    if system in ("ICD10", "ICD9"):
        return {code[:4] if system == "ICD9" and code.startswith("E") else code[:3]}
    if system == "READ2":
        return {code[:-1]} if len(code) > 1 else set()
    if system == "ICPC2":
        rubric = code[1:3]
        if not rubric.isdigit():
            return set()
        number = int(rubric)
        component = "01-29" if number < 30 else "30-69" if number < 70 else "70-99"
        return {f"{code[0]}{component}"}
    if system == "ATC":
        above = {7: 5, 5: 4, 4: 3, 3: 1}.get(len(code))
        return {code[:above]} if above else set()
    return parents.get(code, set())


def _check_usable(ctx: CompileContext, study_file: Path) -> None:
    if not any(ev.diagnosis or ev.prescription for _, ev in ctx.evidence):
        raise AscertainError(
            f"{study_file}: the study reads no diagnosis or prescription evidence; "
            "there are no codes to audit"
        )


def check_codes_folder(study_file: Path, extract: Path | str | None, out: Path | None) -> Path:
    """The output folder the audit writes into, checked before any work is done.

    Args:
        study_file: The study.
        extract: The extract (default: the study's own).
        out: The folder (default: the study's output folder, beside the build's files).

    Raises:
        AscertainError: Bad config, a study without coded evidence; OutputFolderError: the
            folder is not the tool's, or overlaps the extract.
    """
    loaded = load_study(study_file)
    _check_usable(CompileContext(loaded.study, loaded.catalog, loaded.measures), study_file)
    folder = out if out is not None else loaded.study.output.folder
    source = resolve_extract(extract or loaded.study.extract)
    check_folder(folder, CODES, inputs=local_inputs(source, compile_study(loaded)))
    return folder


def audit_codes(study_file: Path, extract: Path | str | None = None) -> CodeAudit:
    """Run the code audit of a study on an extract (DuckDB).

    Args:
        study_file: The study.
        extract: The extract (default: the study's own).

    Raises:
        AscertainError: Bad config, a study without coded evidence, a bad extract, an engine
            failure.
    """
    ready = prepare(study_file, BuildOptions(extract=extract))
    loaded = ready.loaded
    ctx = CompileContext(loaded.study, loaded.catalog, loaded.measures)
    _check_usable(ctx, study_file)
    plan = audit_plan(ready.plan, ctx)
    with open_extract(ready.extract, plan.sources) as opened:
        run = ready.engine.run(plan, opened.tables)
    out = {name: table.to_pylist() for name, table in run.outputs.items()}
    evidence = coded_evidence(ctx)
    matched, by_year = _matched(evidence, out["audit_code_counts"], out["audit_code_years"])
    return CodeAudit(
        study=loaded.study.study,
        threshold=loaded.study.output.small_cell_threshold,
        matched=matched,
        by_year=by_year,
        unseen=_unseen(evidence, out["audit_extract_codes"]),
        near_misses=_near_misses(
            evidence, matched, out[names.CODES_TO_EVIDENCE], out["audit_extract_codes"]
        ),
        totals=sorted(
            (
                {
                    "table": r["source_table"],
                    "used_rows": r["used_rows"],
                    "matched_rows": r["matched_rows"],
                    "unmatched_rows": r["unmatched_rows"],
                }
                for r in out["audit_totals"]
            ),
            key=lambda r: r["table"],
        ),
    )


def _named_by(ev: EvidenceCodes, system: str, code: str) -> tuple[str, str, str]:
    """(list, list code, term) under which an evidence counts a code: the longest entry."""
    covering = [e for e in ev.entries if e.covers(system, code)]
    if covering:
        best = max(covering, key=lambda e: len(e.code))  # the first of the longest
        return best.list_name, best.written, best.term
    if code in ev.widened:
        return ev.widened[code], "", ""  # a concept below a member, through the hierarchy
    return "", "", ""


def _matched(
    evidence: list[EvidenceCodes], counts: list[dict[str, Any]], years: list[dict[str, Any]]
) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    by_number = {evidence_number(ev.key): ev for ev in evidence}
    matched = []
    for row in counts:
        ev = by_number[row["evidence"]]
        list_name, list_code, term = _named_by(ev, row["code_system"], row["code"])
        matched.append(
            {
                "definition": ev.definition,
                "evidence": ev.evidence,
                "system": row["code_system"],
                "list": list_name,
                "list_code": list_code,
                "code_raw": row["raw_code"],
                "code_normalised": row["code"],
                "term": term,
                "rows": row["n_rows"],
                "patients": row["patients"],
                "first_year": row["first_year"],
                "last_year": row["last_year"],
            }
        )
    per_year = [
        {
            "definition": by_number[row["evidence"]].definition,
            "evidence": by_number[row["evidence"]].evidence,
            "system": row["code_system"],
            "code_raw": row["raw_code"],
            "code_normalised": row["code"],
            "year": row["year"],
            "rows": row["n_rows"],
            "patients": row["patients"],
        }
        for row in years
    ]
    order = ("definition", "evidence", "system", "code_normalised", "code_raw")
    matched.sort(key=lambda r: tuple(r[k] for k in order))
    per_year.sort(key=lambda r: (*(r[k] for k in order), r["year"]))
    return matched, per_year


def _unseen(evidence: list[EvidenceCodes], extract_codes: list[dict[str, Any]]) -> list[dict]:
    """Each entry of an evidence that no usable row of its table carries.

    With a SNOMED CT hierarchy, an entry is seen when a concept below it is.
    """
    rows = []
    for ev in evidence:
        table = ev.table
        seen = [(r["code_system"], r["code"]) for r in extract_codes if r["source_table"] == table]
        for entry in ev.entries:
            below = descendants([entry.code], ev.children) if entry.system == "SNOMED" else set()
            if any(entry.covers(s, c) or (s == entry.system and c in below) for s, c in seen):
                continue
            rows.append(
                {
                    "definition": ev.definition,
                    "evidence": ev.evidence,
                    "system": entry.system,
                    "list": entry.list_name,
                    "code": entry.written,
                    "term": entry.term,
                    "match": "exact" if entry.exact else "prefix",
                }
            )
    rows.sort(key=lambda r: (r["definition"], r["evidence"], r["list"], r["system"], r["code"]))
    return rows


def _near_misses(
    evidence: list[EvidenceCodes],
    matched: list[dict[str, Any]],
    code_matches: list[dict[str, Any]],
    extract_codes: list[dict[str, Any]],
) -> list[dict[str, Any]]:
    """Extract codes sharing a parent with an evidence's matched codes that it does not name.

    A code the evidence names, included or excluded (an exclusion is a decision, not a miss),
    is never a near miss, whatever its rows; counts are over every usable row of the code.
    """
    named: dict[int, set[tuple[str, str]]] = {}
    for row in code_matches:
        named.setdefault(row["evidence"], set()).add((row["code_system"], row["code"]))
    rows = []
    for ev in evidence:
        mine = [
            r for r in matched if r["definition"] == ev.definition and r["evidence"] == ev.evidence
        ]
        inverse: dict[str, set[str]] = {}
        for parent, kids in ev.children.items():
            for kid in kids:
                inverse.setdefault(kid, set()).add(parent)
        wanted = {
            (r["system"], p)
            for r in mine
            for p in parent_of(r["system"], r["code_normalised"], inverse)
        }
        names = named.get(evidence_number(ev.key), set())
        found = []
        for code in extract_codes:
            system, normalised = code["code_system"], code["code"]
            if code["source_table"] != ev.table or (system, normalised) in names:
                continue
            shared = sorted(
                p for p in parent_of(system, normalised, inverse) if (system, p) in wanted
            )
            if shared:
                found.append((code, shared[0]))
        found.sort(key=lambda f: (-f[0]["patients"], -f[0]["n_rows"], f[0]["code"]))
        rows += [
            {
                "definition": ev.definition,
                "evidence": ev.evidence,
                "system": code["code_system"],
                "code_normalised": code["code"],
                "parent": parent,
                "rows": code["n_rows"],
                "patients": code["patients"],
                "rank": rank,
            }
            for rank, (code, parent) in enumerate(found, start=1)
        ]
    rows.sort(key=lambda r: (r["definition"], r["evidence"], r["rank"]))
    return rows
