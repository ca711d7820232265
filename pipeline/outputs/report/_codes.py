"""The report's codes section: what ``ascertain codes`` found, suppressed by the audit's own rule.

Shown only when the build folder holds the audit's files (``ascertain codes --out`` into the
build folder). The audit counts rows and patients of the whole extract, not of the cohort, so
none of its counts is a sum of the report's other counts; its own identities (a code's years
add up to its rows, a table's used rows are its matched plus unmatched rows) are those the
release rule already protects. So the section reuses that rule,
:func:`pipeline.outputs._codes_release.protect_audit`, on all four counted tables, and shows
two of them: each evidence's matched codes and its near misses, with the report's own
small-cell threshold. Files already suppressed (``ascertain codes --release``: markers in the
counts) are not shown: they were suppressed with the threshold of their own run, which may be
lower than the report's, and a hidden count cannot be suppressed again; the report says so.
"""

from __future__ import annotations

import csv
from html import escape
from pathlib import Path
from typing import Any

import polars as pl

from pipeline.outputs._codes_release import AUDIT_FILES, COUNTED, Rows, protect_audit
from pipeline.outputs.report._html_cells import n_cell, table

MATCHED_COLUMNS = ("definition", "evidence", "system", "list", "code_raw", "term")
NEAR_COLUMNS = ("definition", "evidence", "system", "code_normalised", "parent")
COUNTS = ("rows", "patients")
RELEASED_NOTE = (
    "The build folder holds a copy of the code audit already suppressed for release "
    "(ascertain codes --release), so the codes section is left out: the report suppresses the "
    "audit itself, with its own threshold, from the patient-level files (run ascertain codes "
    "without --release into the build folder)."
)

_COUNT_COLUMNS = {"rows", "patients", "used_rows", "matched_rows", "unmatched_rows"}


def read_audit(output_dir: Path) -> tuple[dict[str, Rows], bool] | None:
    """The audit's counted tables from a build folder, and whether they are already released.

    Returns:
        ``None`` when the folder lacks any of the audit's files (no audit was written there);
        else the tables (counts as ints, or as their markers in a released copy) and True when
        any count is a marker.
    """
    tables: dict[str, Rows] = {}
    released = False
    for name, (attribute, _) in AUDIT_FILES.items():
        path = output_dir / name
        if not path.is_file():
            return None
        if attribute not in COUNTED:
            continue
        with path.open(encoding="utf-8", newline="") as handle:
            rows = list(csv.DictReader(handle))
        for row in rows:
            for column in _COUNT_COLUMNS & set(row):
                text = row[column]
                if text.isdigit():
                    row[column] = int(text)
                else:
                    released = True
        tables[attribute] = rows
    return tables, released


def codes_summaries(tables: dict[str, Rows], threshold: int) -> dict[str, pl.DataFrame]:
    """The section's two suppressed tables, as the report's summary CSVs hold them (text).

    Args:
        tables: The patient-level audit's counted tables (:func:`read_audit`).
        threshold: The report's small-cell threshold.
    """
    shown = protect_audit(tables, threshold)
    return {
        "codes_matched": _frame(shown["matched"], MATCHED_COLUMNS),
        "codes_near_misses": _frame(shown["near_misses"], NEAR_COLUMNS),
    }


def _frame(rows: list[dict[str, Any]], keys: tuple[str, ...]) -> pl.DataFrame:
    columns = (*keys, *COUNTS)
    data = {c: [str(r[c]) for r in rows] for c in columns}
    return pl.DataFrame(data, schema=dict.fromkeys(columns, pl.String))


def codes_section(matched: pl.DataFrame | None, near: pl.DataFrame | None) -> str:
    """Per definition: its matched codes and near misses, with rows and patients."""
    if matched is None or near is None:
        return ""
    parts = []
    definitions = sorted(set(matched["definition"]) | set(near["definition"]))
    for definition in definitions:
        mine = matched.filter(pl.col("definition") == definition).iter_rows(named=True)
        rows = [
            f"<tr><td>{escape(r['evidence'])}</td><td>{escape(r['system'])}</td>"
            f"<td>{escape(r['list'])}</td><td>{escape(r['code_raw'])}</td>"
            f"<td>{escape(r['term'])}</td>{n_cell(r['rows'])}{n_cell(r['patients'])}</tr>"
            for r in mine
        ]
        misses = near.filter(pl.col("definition") == definition).iter_rows(named=True)
        near_rows = [
            f"<tr><td>{escape(r['evidence'])}</td><td>{escape(r['system'])}</td>"
            f"<td>{escape(r['code_normalised'])}</td><td>{escape(r['parent'])}</td>"
            f"{n_cell(r['rows'])}{n_cell(r['patients'])}</tr>"
            for r in misses
        ]
        head = ["Evidence", "System", "List", "Code as written", "Term", "Rows", "Patients"]
        parts.append(f"<h3>{escape(definition)}</h3>" + table(head, rows, [5, 6]))
        if near_rows:
            near_head = ["Evidence", "System", "Code", "Shares parent", "Rows", "Patients"]
            parts.append('<p class="note">Near misses</p>' + table(near_head, near_rows, [4, 5]))
    return "".join(parts) + (
        '<p class="note">From <code>ascertain codes</code>, over every usable row of the '
        "extract (not only the cohort): the codes each piece of evidence matched, and codes "
        "it did not match that share a parent with one it did. Suppressed by the audit's own "
        "release rule, the same as <code>ascertain codes --release</code>.</p>"
    )
