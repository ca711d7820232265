"""The code audit's files, its suppressed copy for release, and its terminal tables.

``release`` hands every count of the audit's CSVs to :func:`pipeline.stats.protect_cells` as
one system: the same set of rows or patients has one key wherever it appears (a code's counts
as a near miss of several evidences), a code's rows per year add up to its rows, an
evidence's rows of one normalised code equal the code's rows as a near miss elsewhere when
they do (no source or length restriction), and each table's used rows are its matched plus
unmatched rows. A line whose patients are hidden has its rows hidden too: rows of fewer than
N patients say something about those few.
"""

from __future__ import annotations

import csv
import io
from collections import defaultdict
from dataclasses import replace
from pathlib import Path
from typing import Any

from rich.table import Table

from pipeline.outputs._ownership import CODES, install, staging
from pipeline.workflows.codes import PATIENT_LEVEL, CodeAudit

FILES = {
    "codes_matched.csv": (
        "matched",
        "definition evidence system list list_code code_raw code_normalised term rows patients "
        "first_year last_year",
    ),
    "codes_by_year.csv": (
        "by_year",
        "definition evidence system code_raw code_normalised year rows patients",
    ),
    "codes_unseen.csv": ("unseen", "definition evidence system list code term match"),
    "codes_near_misses.csv": (
        "near_misses",
        "definition evidence system code_normalised parent rows patients rank",
    ),
    "codes_totals.csv": ("totals", "table used_rows matched_rows unmatched_rows"),
}
"""Each file of the audit: the CodeAudit attribute it holds and its columns, in order."""


def released_note(threshold: int) -> str:
    """What a released audit says of itself."""
    return (
        f"Suppressed for release: a count below {threshold} is shown as <{threshold}, a count "
        "hidden so that a small one cannot be worked out is shown as *, and the rows of a "
        "line whose patients are hidden are hidden. Not covered: knowledge from outside "
        "these files, and the first and last years, which are shown."
    )


def _cells(audit: CodeAudit) -> tuple[dict[str, int], list[tuple[tuple[str, int], ...]]]:
    """Every count as a keyed cell, and the identities between them."""
    values: dict[str, int] = {}
    relations: list[tuple[tuple[str, int], ...]] = []
    years: dict[str, list[str]] = defaultdict(list)
    for row in audit.by_year:
        key = _line_key("y", row) + f":{row['year']}"
        values[f"{key}.rows"], values[f"{key}.patients"] = row["rows"], row["patients"]
        years[_line_key("m", row)].append(f"{key}.rows")
    by_code: dict[tuple[str, ...], list[dict[str, Any]]] = defaultdict(list)
    for row in audit.matched:
        key = _line_key("m", row)
        values[f"{key}.rows"], values[f"{key}.patients"] = row["rows"], row["patients"]
        relations.append(((f"{key}.rows", -1), *((k, 1) for k in years[key])))
        code = (row["definition"], row["evidence"], row["system"], row["code_normalised"])
        by_code[code].append(row)
    for row in audit.near_misses:
        key = f"x:{row['system']}:{row['code_normalised']}"
        values[f"{key}.rows"], values[f"{key}.patients"] = row["rows"], row["patients"]
    for (_, _, system, code), rows in by_code.items():
        extract = f"x:{system}:{code}"
        if f"{extract}.rows" not in values:
            continue
        parts = [(_line_key("m", r) + ".rows", 1) for r in rows]
        if sum(r["rows"] for r in rows) == values[f"{extract}.rows"]:
            relations.append(((f"{extract}.rows", -1), *parts))
        if len(rows) == 1 and rows[0]["patients"] == values[f"{extract}.patients"]:
            line = _line_key("m", rows[0]) + ".patients"
            relations.append(((f"{extract}.patients", -1), (line, 1)))
    for row in audit.totals:
        key = f"t:{row['table']}"
        for part in ("used_rows", "matched_rows", "unmatched_rows"):
            values[f"{key}.{part}"] = row[part]
        parts = ((f"{key}.matched_rows", 1), (f"{key}.unmatched_rows", 1))
        relations.append(((f"{key}.used_rows", -1), *parts))
    return values, relations


def _line_key(prefix: str, row: dict[str, Any]) -> str:
    return f"{prefix}:{row['definition']}:{row['evidence']}:{row['system']}:{row['code_raw']}"


def release(audit: CodeAudit) -> CodeAudit:
    """The audit with its small counts, and those that would give them away, hidden."""
    # Loads scipy, which the audit alone never needs.
    from pipeline.stats import protect_cells
    from pipeline.stats._disclosure import hidden_marker

    values, relations = _cells(audit)
    threshold = audit.threshold
    hidden = set(protect_cells(values, relations, threshold))
    # Rows of a line whose patients are hidden are withheld (hiding more stays safe).
    hidden |= {k.removesuffix(".patients") + ".rows" for k in hidden if k.endswith(".patients")}

    def shown(key: str) -> int | str:
        return hidden_marker(values[key], threshold) if key in hidden else values[key]

    def masked(row: dict[str, Any], key: str, parts: tuple[str, ...]) -> dict[str, Any]:
        return {**row, **{part: shown(f"{key}.{part}") for part in parts}}

    pair = ("rows", "patients")
    return replace(
        audit,
        matched=[masked(r, _line_key("m", r), pair) for r in audit.matched],
        by_year=[masked(r, _line_key("y", r) + f":{r['year']}", pair) for r in audit.by_year],
        near_misses=[
            masked(r, f"x:{r['system']}:{r['code_normalised']}", pair) for r in audit.near_misses
        ],
        totals=[
            masked(r, f"t:{r['table']}", ("used_rows", "matched_rows", "unmatched_rows"))
            for r in audit.totals
        ],
    )


def _csv_text(rows: list[dict[str, Any]], columns: list[str]) -> str:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(columns)
    for row in rows:
        writer.writerow(["" if row[c] is None else row[c] for c in columns])
    return buffer.getvalue()


def write_audit(audit: CodeAudit, out: Path, *, for_release: bool = False) -> list[Path]:
    """Write the audit's CSVs into ``out`` (checked with ``check_codes_folder`` first).

    Args:
        audit: What :func:`pipeline.workflows.codes.audit_codes` found.
        out: The folder; only files an earlier audit wrote there are replaced.
        for_release: Suppress small counts first (:func:`release`).

    Raises:
        OutputFolderError: ``out`` holds files ascertain did not write there.
    """
    written = release(audit) if for_release else audit
    names = sorted(FILES)
    with staging(out) as staged:
        for name, (attribute, columns) in FILES.items():
            text = _csv_text(getattr(written, attribute), columns.split())
            (staged / name).write_text(text, encoding="utf-8")
        install(staged, out, CODES, names)
    return [out / name for name in names]


def header(audit: CodeAudit, *, for_release: bool) -> str:
    """The first line the command prints: what the output may be used for."""
    return released_note(audit.threshold) if for_release else PATIENT_LEVEL


def audit_tables(audit: CodeAudit, *, top: int = 3) -> list[Table]:
    """One compact table per definition (patient-level: the counts are exact).

    Each evidence's matched codes (normalised), rows, list codes unseen, first near misses.
    """
    tables: dict[str, Table] = {}
    summary: dict[tuple[str, str], dict[str, Any]] = defaultdict(
        lambda: {"codes": set(), "rows": 0, "unseen": 0, "near": []}
    )
    for row in audit.matched:
        entry = summary[row["definition"], row["evidence"]]
        entry["codes"].add((row["system"], row["code_normalised"]))
        entry["rows"] += row["rows"]
    for row in audit.unseen:
        summary[row["definition"], row["evidence"]]["unseen"] += 1
    for row in audit.near_misses:
        near = summary[row["definition"], row["evidence"]]["near"]
        if len(near) < top:
            near.append(f"{row['code_normalised']} ({row['patients']:,} pts)")
    for (definition, evidence), entry in sorted(summary.items()):
        if definition not in tables:
            table = Table(title=definition, title_justify="left")
            for column in ("evidence", "codes matched", "rows", "list codes unseen"):
                table.add_column(column, justify="left" if column == "evidence" else "right")
            table.add_column(f"near misses (first {top})")
            tables[definition] = table
        tables[definition].add_row(
            evidence,
            f"{len(entry['codes']):,}",
            f"{entry['rows']:,}",
            f"{entry['unseen']:,}",
            ", ".join(entry["near"]) or "-",
        )
    return list(tables.values())
