"""The rates section's table of observed and expected events and SMRs (with reference rates).

One row per outcome, then one per age band and one per sex of it, as ``summary/smr.csv``.

It formats ``summary/smr.csv`` (already suppressed, :mod:`._smr`) and says where the
reference rates come from, as the table's own header lines state it.
"""

from __future__ import annotations

from html import escape
from typing import Any

import polars as pl

from pipeline.config._reference_rates import ReferenceRates
from pipeline.outputs.report._html_cells import n_cell, table

__all__ = ["smr_section"]


def _ratio(r: dict[str, Any]) -> str:
    if r["smr"] is None:
        return ""
    return f"{r['smr']:.2f} ({r['smr_low']:.2f} to {r['smr_high']:.2f})"


def _stratum(r: dict[str, Any]) -> str:
    """The row's group: the whole outcome, one age band (all sexes) or one sex (all ages)."""
    if r["age_band"] != "all":
        return f"age {r['age_band']}"
    if r["sex"] != "all":
        return f"sex {r['sex']}"
    return "all"


def _expected(value: float | None) -> str:
    return "" if value is None else f"{value:,.2f}"


def smr_section(
    smr: pl.DataFrame | None, reference: ReferenceRates | None, titles: dict[str, str]
) -> str:
    """The HTML of the SMR table, or "" when the study names no reference rates.

    Args:
        smr: ``summary/smr.csv`` as a frame, or None.
        reference: The reference rate table (for its name and source).
        titles: Outcome titles.
    """
    if smr is None or reference is None:
        return ""
    rows = [
        f"<tr><td>{escape(titles.get(r['outcome'], r['outcome']))}</td>"
        f"<td>{escape(_stratum(r))}</td>{n_cell(r['observed'])}"
        f'<td class="num">{_expected(r["expected"])}</td>'
        f'<td class="num">{_ratio(r)}</td><td>{escape(r["note"] or "")}</td></tr>'
        for r in smr.iter_rows(named=True)
    ]
    head = ["Outcome", "Group", "Observed, n", "Expected", "SMR (95% CI)", "Note"]
    note = f" {reference.note}." if reference.note else ""
    return (
        "<h3>Observed and expected events</h3>"
        + table(head, rows, [2, 3, 4])
        + '<p class="note">Expected: the cohort\'s person-years in each age band'
        + (", sex" if reference.by_sex else "")
        + (" and calendar year" if reference.by_year else "")
        + " times the reference rate for it. SMR: observed / expected, with the exact Poisson "
        "interval of the observed count (the expected count taken as fixed), for the whole "
        "outcome, each age band (all sexes) and each sex (all ages). An SMR is left out when "
        "its observed count is suppressed.</p>"
        f'<ul class="note"><li>Reference rates: {escape(reference.name)}; source: '
        f"{escape(reference.source)}; figures {escape(reference.figures)}.{escape(note)}</li></ul>"
    )
