"""The code audit's files, its suppressed copy for release, and its terminal tables.

The release rule itself lives in :mod:`pipeline.outputs._codes_release`, shared with the
report's codes section.
"""

from __future__ import annotations

import csv
import io
from collections import defaultdict
from dataclasses import replace
from pathlib import Path
from typing import Any

from rich.table import Table

from pipeline.outputs._codes_release import AUDIT_FILES, COUNTED, protect_audit
from pipeline.outputs._ownership import CODES, install, staging
from pipeline.workflows.codes import PATIENT_LEVEL, CodeAudit

FILES = AUDIT_FILES
"""Each file of the audit (defined with the release rule, which the report shares)."""


def released_note(threshold: int) -> str:
    """What a released audit says of itself."""
    return (
        f"Suppressed for release: a count below {threshold} is shown as <{threshold}, a count "
        "hidden so that a small one cannot be worked out is shown as *, and the rows of a "
        "line whose patients are hidden are hidden. Not covered: knowledge from outside "
        "these files, and the first and last years, which are shown."
    )


def release(audit: CodeAudit) -> CodeAudit:
    """The audit with its small counts, and those that would give them away, hidden."""
    tables = {name: getattr(audit, name) for name in COUNTED}
    return replace(audit, **protect_audit(tables, audit.threshold))


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
