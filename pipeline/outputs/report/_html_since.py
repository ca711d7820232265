"""The rates section's table by time since index (only when the study split follow-up by it).

It formats rows already suppressed (:mod:`._rates_since`): one row per outcome and
since-index band, with its events, person-years and rate; a hidden count's rate is not shown.
"""

from __future__ import annotations

from collections.abc import Sequence
from html import escape

import polars as pl

from pipeline.outputs.report._html_cells import n_cell, table
from pipeline.outputs.report._rates_since import SINCE_COLUMN

__all__ = ["since_index_table"]

_ALL = "all"


def since_index_table(rates: pl.DataFrame, outcomes: Sequence[str], titles: dict[str, str]) -> str:
    """The HTML table of rates by years since index, or "" when the study has no such split.

    Args:
        rates: ``summary/rates.csv`` as a frame (suppressed).
        outcomes: The study's outcomes, in order.
        titles: Outcome titles.
    """
    if SINCE_COLUMN not in rates.columns:
        return ""
    rows = []
    for o in outcomes:
        for r in rates.filter((pl.col("outcome") == o) & (pl.col(SINCE_COLUMN) != _ALL)).iter_rows(
            named=True
        ):
            rate = (
                ""
                if r["rate_per_1000_py"] is None
                else f"{r['rate_per_1000_py']:.2f} ({r['rate_low']:.2f} to {r['rate_high']:.2f})"
            )
            rows.append(
                f"<tr><td>{escape(titles.get(o, o))}</td><td>{escape(r[SINCE_COLUMN])}</td>"
                f'{n_cell(r["events"])}<td class="num">{r["person_years"]:,.1f}</td>'
                f'<td class="num">{rate}</td></tr>'
            )
    head = ["Outcome", "Years since index", "Events, n", "Person-years", "Rate (95% CI)"]
    return (
        "<h3>Rates by time since index</h3>"
        + table(head, rows, [2, 3, 4])
        + '<p class="note">Whole years completed since the index date (anniversaries), over all '
        "ages and calendar years; the bands of an outcome add up to its total above. A band "
        "whose count is suppressed has no rate.</p>"
    )
