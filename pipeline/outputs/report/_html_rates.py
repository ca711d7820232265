"""The report's rates section: small multiples of rate by age band, and the rate tables.

Like the other sections it formats tables already suppressed (:mod:`._rates`): a rate
that is missing there is not drawn and not printed. The figure is one small panel per outcome,
the rate per 1,000 person-years of each age band over all years as a point with its 95%
interval, in plain inline SVG like :mod:`._svg`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from html import escape
from typing import Any

import polars as pl

from pipeline.outputs.report._html_cells import n_cell as _n
from pipeline.outputs.report._html_cells import table as _table
from pipeline.outputs.report._html_since import since_index_table
from pipeline.outputs.report._rates import standard_sources
from pipeline.outputs.report._rates_since import SINCE_COLUMN
from pipeline.outputs.report._svg import _nice_step, _text, value_axis

__all__ = ["rates_section", "render_rate_panel"]

_ALL = "all"


def render_rate_panel(title: str, bands: Sequence[tuple[str, float | None, float, float]]) -> str:
    """One outcome's panel: each band's rate (a dot) and interval (a line); gaps if hidden.

    Args:
        title: The outcome's title (for the accessible label).
        bands: ``(age band, rate or None, low, high)`` in band order.

    Returns:
        An ``<svg>`` element.
    """
    w, h, left, right, top, bottom = 300, 200, 48, 10, 12, 38
    shown = [b for b in bands if b[1] is not None]
    highest = max((b[3] for b in shown if math.isfinite(b[3])), default=0.0)
    slot = (w - left - right) / max(len(bands), 1)
    step = _nice_step(max(highest, 1e-9) / 4)
    parts, sy = value_axis((w, h, left, right, top, bottom), highest, step, lambda v: f"{v:.4g}")
    for i, (label, rate, low, high) in enumerate(bands):
        x = left + slot * (i + 0.5)
        parts.append(_text(x, h - bottom + 16, label, "tick tick-x"))
        if rate is None:
            continue
        parts.append(f'<path d="M{x:.1f} {sy(low):.1f} V{sy(high):.1f}" class="ci"/>')
        parts.append(f'<circle cx="{x:.1f}" cy="{sy(rate):.1f}" r="3.5" class="dot"/>')
    parts.append(_text((left + w - right) / 2, h - 4, "Age band", "axis-label"))
    label = f"Rate of {title} per 1,000 person-years by age band"
    return (
        f'<svg class="rates" viewBox="0 0 {w} {h}" role="img" aria-label="{escape(label)}">'
        f"{''.join(parts)}</svg>"
    )


def _ci(r: dict[str, Any]) -> str:
    if r["rate_per_1000_py"] is None:
        return ""
    return f"{r['rate_per_1000_py']:.2f} ({r['rate_low']:.2f} to {r['rate_high']:.2f})"


def _outcome_table(part: pl.DataFrame) -> str:
    years = sorted({y for y in part["calendar_year"] if y != _ALL})
    cells = {(r["age_band"], r["calendar_year"]): r for r in part.iter_rows(named=True)}
    bands = list(dict.fromkeys(b for b in part["age_band"] if b != _ALL))
    head = ["Age band", *years, "All years: events, n", "Person-years", "Rate (95% CI)"]
    rows = []
    for band in [*bands, _ALL]:
        year_cells = []
        for y in years:
            r = cells.get((band, y))
            if r is None:
                year_cells.append('<td class="num"></td>')
                continue
            rate = "" if r["rate_per_1000_py"] is None else f"{r['rate_per_1000_py']:.2f} "
            year_cells.append(
                f'<td class="num">{rate}<span class="pct">({_n(r["events"], "")})</span></td>'
            )
        total = cells[(band, _ALL)]
        name = "All ages" if band == _ALL else band
        rows.append(
            f"<tr><td>{escape(name)}</td>{''.join(year_cells)}{_n(total['events'])}"
            f'<td class="num">{total["person_years"]:,.1f}</td>'
            f'<td class="num">{_ci(total)}</td></tr>'
        )
    return _table(head, rows)


def _standardised_table(frame: pl.DataFrame, titles: dict[str, str]) -> str:
    rows = [
        f"<tr><td>{escape(titles.get(r['outcome'], r['outcome']))}</td>"
        f'<td>{escape(r["standard"])}</td><td class="num">{_ci(r)}</td>'
        f"<td>{escape(r['note'] or '')}</td></tr>"
        for r in frame.iter_rows(named=True)
    ]
    return _table(["Outcome", "Standard population", "Rate (95% CI)", "Note"], rows, [2])


def rates_section(
    rates: pl.DataFrame,
    standardised: pl.DataFrame,
    outcomes: Sequence[str],
    titles: dict[str, str],
) -> str:
    """The section's HTML from the published (suppressed) rate tables.

    Args:
        rates: ``summary/rates.csv`` as a frame.
        standardised: ``summary/standardised_rates.csv`` as a frame.
        outcomes: The study's outcomes, in order.
        titles: Outcome titles.
    """
    figs, tables = [], []
    by_year = rates.filter(pl.col("calendar_year") != _ALL).height > 0  # the study split years
    since = since_index_table(rates, outcomes, titles)
    if since:
        rates = rates.filter(pl.col(SINCE_COLUMN) == _ALL)
    for o in outcomes:
        part = rates.filter(pl.col("outcome") == o)
        if not part.height:
            continue
        title = titles.get(o, o)
        bands = [
            (r["age_band"], r["rate_per_1000_py"], r["rate_low"] or 0.0, r["rate_high"] or 0.0)
            for r in part.filter(
                (pl.col("calendar_year") == _ALL) & (pl.col("age_band") != _ALL)
            ).iter_rows(named=True)
        ]
        figs.append(
            f"<figure><figcaption>{escape(title)}</figcaption>"
            f"{render_rate_panel(title, bands)}</figure>"
        )
        tables.append(f"<h3>{escape(title)}</h3>{_outcome_table(part)}")
    standards = "".join(
        f"<li>{escape(name)}: {escape(source)}; figures {escape(figures)}.</li>"
        for name, source, figures in standard_sources()
    )
    return (
        f'<div class="figs">{"".join(figs)}</div>'
        '<p class="note">Rate per 1,000 person-years of each age band over all calendar years, '
        "with its 95% interval; a band whose count is suppressed is not drawn.</p>"
        + "".join(tables)
        + '<p class="note">'
        + (
            "Each year's cell shows the rate per 1,000 person-years and, in brackets, the events. "
            if by_year
            else ""
        )
        + "Person-time runs from index to onset or the end of follow-up (days / 365.25), "
        + (
            "counted in the age band and calendar year it falls in"
            if by_year
            else "counted in the age band it falls in"
        )
        + "; only patients at risk at index count. Intervals: exact Poisson (Garwood).</p>"
        + since
        + "<h3>Standardised rates</h3>"
        + _standardised_table(standardised, titles)
        + '<p class="note">Directly standardised to each standard population over the age '
        "bands of the study (the standard's bands inside each study band summed; bands "
        "outside the study's ages carry no weight), with the gamma interval of Fay and Feuer "
        "(1997). A standardised rate is left out when a band's count is suppressed, as is "
        f'any rate whose count is suppressed.</p><ul class="note">{standards}</ul>'
    )
