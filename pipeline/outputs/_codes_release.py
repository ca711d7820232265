"""The code audit's files and the one rule that suppresses them for release.

Shared by ``ascertain codes --release`` (:mod:`pipeline.workflows._codes_files`) and the
report's codes section (:mod:`pipeline.outputs.report._codes`), so both hide the same counts.
:func:`protect_audit` hands every count of the audit's tables to
:func:`pipeline.stats.protect_cells` as one system: the same set of rows or patients has one key
wherever it appears (a code's counts as a near miss of several evidences), a code's rows per
year add up to its rows, an evidence's rows of one normalised code equal the code's rows as a
near miss elsewhere when they do (no source or length restriction), and each table's used rows
are its matched plus unmatched rows. A line whose patients are hidden has its rows hidden too:
rows of fewer than N patients say something about those few.
"""

from __future__ import annotations

from collections import defaultdict
from typing import Any

Rows = list[dict[str, Any]]

COUNTED = ("matched", "by_year", "near_misses", "totals")
"""The audit's tables that hold counts (``unseen`` lists codes only)."""

AUDIT_FILES = {
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
"""Each file of the audit: the table (CodeAudit attribute) it holds and its columns, in order."""


def _cells(tables: dict[str, Rows]) -> tuple[dict[str, int], list[tuple[tuple[str, int], ...]]]:
    """Every count as a keyed cell, and the identities between them."""
    values: dict[str, int] = {}
    relations: list[tuple[tuple[str, int], ...]] = []
    years: dict[str, list[str]] = defaultdict(list)
    for row in tables["by_year"]:
        key = _line_key("y", row) + f":{row['year']}"
        values[f"{key}.rows"], values[f"{key}.patients"] = row["rows"], row["patients"]
        years[_line_key("m", row)].append(f"{key}.rows")
    by_code: dict[tuple[str, ...], list[dict[str, Any]]] = defaultdict(list)
    for row in tables["matched"]:
        key = _line_key("m", row)
        values[f"{key}.rows"], values[f"{key}.patients"] = row["rows"], row["patients"]
        relations.append(((f"{key}.rows", -1), *((k, 1) for k in years[key])))
        code = (row["definition"], row["evidence"], row["system"], row["code_normalised"])
        by_code[code].append(row)
    for row in tables["near_misses"]:
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
    for row in tables["totals"]:
        key = f"t:{row['table']}"
        for part in ("used_rows", "matched_rows", "unmatched_rows"):
            values[f"{key}.{part}"] = row[part]
        parts = ((f"{key}.matched_rows", 1), (f"{key}.unmatched_rows", 1))
        relations.append(((f"{key}.used_rows", -1), *parts))
    return values, relations


def _line_key(prefix: str, row: dict[str, Any]) -> str:
    return f"{prefix}:{row['definition']}:{row['evidence']}:{row['system']}:{row['code_raw']}"


def protect_audit(tables: dict[str, Rows], threshold: int) -> dict[str, Rows]:
    """The audit's counted tables with small counts, and those giving them away, hidden.

    Args:
        tables: ``matched``, ``by_year``, ``near_misses`` and ``totals`` rows, counts as ints.
        threshold: The small-cell threshold.

    Returns:
        The same four tables, each hidden count replaced by its marker (``<N`` or ``*``).
    """
    # Loads scipy, which the audit alone never needs.
    from pipeline.stats import protect_cells
    from pipeline.stats._disclosure import hidden_marker

    values, relations = _cells(tables)
    hidden = set(protect_cells(values, relations, threshold))
    # Rows of a line whose patients are hidden are withheld (hiding more stays safe).
    hidden |= {k.removesuffix(".patients") + ".rows" for k in hidden if k.endswith(".patients")}

    def shown(key: str) -> int | str:
        return hidden_marker(values[key], threshold) if key in hidden else values[key]

    def masked(row: dict[str, Any], key: str, parts: tuple[str, ...]) -> dict[str, Any]:
        return {**row, **{part: shown(f"{key}.{part}") for part in parts}}

    pair = ("rows", "patients")
    return {
        "matched": [masked(r, _line_key("m", r), pair) for r in tables["matched"]],
        "by_year": [
            masked(r, _line_key("y", r) + f":{r['year']}", pair) for r in tables["by_year"]
        ],
        "near_misses": [
            masked(r, f"x:{r['system']}:{r['code_normalised']}", pair)
            for r in tables["near_misses"]
        ],
        "totals": [
            masked(r, f"t:{r['table']}", ("used_rows", "matched_rows", "unmatched_rows"))
            for r in tables["totals"]
        ],
    }
