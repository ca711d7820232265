"""The result sections of the report's HTML page: Table 1, incidence, curves, dependence.

Split from :mod:`._html` by job; like it, everything here formats tables that
:mod:`._write` has already suppressed, and escapes every string from data or user files.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from html import escape
from typing import Any

import polars as pl

from pipeline.compile import names
from pipeline.outputs.report._at_risk import at_risk_note
from pipeline.outputs.report._curves import band_note, curve_note
from pipeline.outputs.report._html_cells import n_cell as _n
from pipeline.outputs.report._html_cells import num as _num
from pipeline.outputs.report._html_cells import table as _table
from pipeline.outputs.report._svg import Curve, render_curves

__all__ = [
    "curves_section",
    "dependence_section",
    "exposure_table_one_section",
    "incidence_section",
    "table_one_section",
]


def _t1_cell(r: dict[str, Any] | None) -> str:
    if r is None:
        return "<td></td>"
    pct = "" if r["percent"] is None else f' <span class="pct">({r["percent"]:.1f}%)</span>'
    return f'<td class="num">{_n(r["n"], "")}{pct}</td>'


def _t1_stat(r: dict[str, Any] | None, kind: str) -> str:
    if r is None or r[kind] is None:  # a median can be shown where the mean is not
        return '<td class="num"></td>'
    if kind == "mean":
        sd = "" if r["sd"] is None else f" ({r['sd']:.1f})"
        return f'<td class="num">{r["mean"]:.1f}{sd}</td>'
    return f'<td class="num">{r["median"]:.1f} [{r["q1"]:.1f}, {r["q3"]:.1f}]</td>'


def _smd(r: dict[str, Any] | None) -> str:
    value = None if r is None else r.get("smd")
    return '<td class="num"></td>' if value is None else f'<td class="num">{value:.2f}</td>'


def table_one_section(frame: pl.DataFrame, outcome: str, title: str, labels: dict[str, str]) -> str:
    by = names.outcome_columns(outcome).incident
    groups = ("overall", f"{by}=false", f"{by}=true", f"{by}=null")
    head = ["Characteristic", "Overall", "Not incident", "Incident", "Not at risk", "SMD"]
    return (
        f"<h3>By incident {escape(title)}</h3>"
        + _t1_table(frame.filter(pl.col("by") == by), groups, head, labels)
        + '<p class="note">SMD: standardised difference, incident against not incident (Austin '
        "2009): the difference in means over the square root of the average of the two "
        "variances, or for a category the difference in proportions over the square root of "
        "the average of p(1 − p). Left empty where a statistic it uses is withheld.</p>"
    )


def exposure_table_one_section(frame: pl.DataFrame, labels: dict[str, str]) -> str:
    """Table 1 of a new-user study by the exposure group started at index."""
    groups = tuple(dict.fromkeys(frame["group"].to_list()))
    values = [g.split("=", 1)[1] for g in groups[1:]]
    head = ["Characteristic", "Overall", *values, "SMD"]
    pair = (
        f"{escape(values[0])} against {escape(values[1])}"
        if len(values) == 2
        else "shown for two groups only"
    )
    return (
        "<h3>By exposure group</h3>"
        + _t1_table(frame, groups, head, labels)
        + f'<p class="note">SMD: standardised difference, {pair} (Austin 2009), computed as in '
        "the tables by outcome. Left empty where a statistic it uses is withheld.</p>"
    )


def _t1_table(
    part: pl.DataFrame, groups: Sequence[str], head: list[str], labels: dict[str, str]
) -> str:
    """One Table 1 as HTML: a column per group and the SMD, rows as the summary lists them."""
    cells = {(r["variable"], r["level"], r["group"]): r for r in part.iter_rows(named=True)}
    span = len(head)
    rows = [
        "<tr><td>Patients, n</td>"
        + "".join(_n(cells[("patients", None, g)]["n"]) for g in groups)
        + "<td></td></tr>"
    ]
    variables = [v for v in dict.fromkeys(part["variable"].to_list()) if v != "patients"]
    for v in variables:
        levels = list(dict.fromkeys(k[1] for k in cells if k[0] == v))
        label = escape(labels.get(v, v))
        col = f' <span class="col">{escape(v)}</span>' if v in labels else ""
        first = cells[(v, levels[0], "overall")]
        if levels == [None]:
            rows.append(f'<tr class="var"><td colspan="{span}">{label}{col}</td></tr>')
            for kind, text in (("mean", "Mean (SD)"), ("median", "Median [Q1, Q3]")):
                rows.append(
                    f'<tr><td class="sub">{text}</td>'
                    + "".join(_t1_stat(cells.get((v, None, g)), kind) for g in groups)
                    + (_smd(first) if kind == "mean" else "<td></td>")
                    + "</tr>"
                )
        elif levels == ["false", "true"]:
            rows.append(
                f'<tr class="var"><td>{label}, n (%){col}</td>'
                + "".join(_t1_cell(cells.get((v, "true", g))) for g in groups)
                + _smd(cells.get((v, "true", "overall")))
                + "</tr>"
            )
        else:
            rows.append(f'<tr class="var"><td colspan="{span}">{label}, n (%){col}</td></tr>')
            rows += [
                f'<tr><td class="sub">{escape(str(lv))}</td>'
                + "".join(_t1_cell(cells.get((v, lv, g))) for g in groups)
                + _smd(cells.get((v, lv, "overall")))
                + "</tr>"
                for lv in levels
            ]
        if first["missing"] != "0":
            rows.append(
                '<tr><td class="sub">Missing, n</td>'
                + "".join(_n((cells.get((v, levels[0], g)) or {}).get("missing")) for g in groups)
                + "<td></td></tr>"
            )
    return _table(head, rows)


def incidence_section(frame: pl.DataFrame) -> str:
    def ci(est: Any, low: Any, high: Any, digits: int) -> str:
        if est is None:
            return ""
        if high is None or (isinstance(high, float) and math.isnan(high)):
            return f"{est:.{digits}f}"
        return f"{est:.{digits}f} ({low:.{digits}f} to {high:.{digits}f})"

    rows = []
    for r in frame.iter_rows(named=True):
        aj = ci(r["cumulative_incidence_percent"], r["ci_low_percent"], r["ci_high_percent"], 2)
        crude = ci(r["crude_percent"], r["crude_low_percent"], r["crude_high_percent"], 2)
        rate = ci(r["rate_per_1000_py"], r["rate_low"], r["rate_high"], 1)
        at = r["cumulative_incidence_years"]
        rows.append(
            f"<tr><td>{escape(r['title'])}</td>{_n(r['at_risk'])}{_n(r['events'])}"
            f'<td class="num">{aj}</td><td class="num">{"" if at is None else f"{at:.2f}"}</td>'
            f'<td class="num">{_num(r["person_years"])}</td>'
            f'<td class="num">{rate}</td><td class="num">{crude}</td></tr>'
        )
    head = [
        "Outcome",
        "At risk, n",
        "Events, n",
        "Cumulative incidence, % (95% CI)",
        "At, years",
        "Person-years",
        "Rate per 1,000 PY (95% CI)",
        "Crude proportion, % (95% CI)",
    ]
    return _table(head, rows) + (
        '<p class="note">At risk: patients without the condition at index. Cumulative incidence: '
        "Aalen–Johansen estimate with death as the competing event, at the last step of the "
        "released curve (At: the horizon when enough patients reach it; earlier, the last time "
        "the curve may show); 95% CI by the delta method (the variance given by Collett 2015) on "
        "the log(−log) scale. "
        "Rate: events per 1,000 person-years (days / 365.25) with an exact Poisson (Garwood) "
        "interval. Crude proportion: events over patients at risk, Wilson interval; it counts "
        "patients whose follow-up ended early as non-cases, so it understates the risk. "
        "Estimates are left empty where a count is suppressed.</p>"
    )


def curves_section(
    curves: dict[str, Curve],
    outcomes: Sequence[str],
    titles: dict[str, str],
    threshold: int,
    at_risk: dict[str, str],
) -> str:
    figs = [
        f"<figure><figcaption>{escape(titles.get(o, o))}</figcaption>{render_curves(curves[o])}"
        f"{at_risk.get(o, '')}</figure>"
        for o in outcomes
        if o in curves
    ]
    missing = [escape(titles.get(o, o)) for o in outcomes if o not in curves]
    note = (
        (
            f'<p class="note">Not drawn because the number of events is suppressed: '
            f"{', '.join(missing)}.</p>"
        )
        if missing
        else ""
    )
    legend = (
        '<div class="legend"><span><span class="swatch"></span>Aalen–Johansen, death as '
        'competing event</span><span><span class="swatch band"></span>its 95% confidence '
        'band</span><span><span class="swatch km"></span>1 − Kaplan–Meier, '
        "deaths censored (overstates risk)</span></div>"
    )
    coarse = "".join(
        f'<p class="note">{escape(text)}</p>'
        for text in (curve_note(threshold), band_note(), at_risk_note(threshold))
    )
    return legend + f'<div class="figs">{"".join(figs)}</div>' + coarse + note


def dependence_section(frame: pl.DataFrame, titles: dict[str, str]) -> str:
    def f(x: Any, d: int = 3) -> str:
        return "" if x is None else f"{x:.{d}f}"

    rows = []
    for r in frame.iter_rows(named=True):
        first, second = (titles.get(r[k], r[k]) for k in ("outcome_1", "outcome_2"))
        pair = f"{escape(first)}<br>× {escape(second)}"
        mark = " †" if r["haldane"] and r["odds_ratio"] is not None else ""
        odds = (
            ""
            if r["odds_ratio"] is None
            else (f"{r['odds_ratio']:.2f} ({r['or_low']:.2f} to {r['or_high']:.2f}){mark}")
        )
        ratio = (
            ""
            if r["oe_ratio"] is None
            else f"{r['oe_ratio']:.2f} ({r['oe_low']:.2f} to {r['oe_high']:.2f})"
        )
        rows.append(
            f'<tr><td class="pair">{pair}</td>{_n(r["n"])}{_n(r["both"])}{_n(r["first_only"])}'
            f'{_n(r["second_only"])}{_n(r["neither"])}<td class="num">{odds}</td>'
            f'<td class="num">{f(r["phi"])}</td><td class="num">{f(r["expected"], 1)}</td>'
            f'<td class="num">{ratio}</td></tr>'
        )
    head = [
        "Pair",
        "At risk of both",
        "Both (observed)",
        "First only",
        "Second only",
        "Neither",
        "Odds ratio (95% CI)",
        "Phi",
        "Expected both",
        "Observed / expected (95% CI)",
    ]
    strata = sorted(set(frame["strata"].to_list())) if frame.height else []
    return _table(head, rows) + (
        '<p class="note">Among patients at risk of both outcomes, incident within the horizon. '
        "Odds ratio with a Woolf interval; † 0.5 added to every cell because one was zero. "
        "Expected both: the patients expected to have both outcomes if the two were "
        "independent within strata of "
        f"{escape(', '.join(strata) or 'age band and sex')} (the sum over strata of patients "
        "times the two outcomes' crude proportions); observed / expected with an exact Poisson "
        "interval treating the expectation as fixed. A ratio above 1 means the outcomes occur "
        "together more often than age and sex explain. Measures are left empty where a cell "
        "is suppressed.</p>"
    )
