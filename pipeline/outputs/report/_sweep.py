"""The sweep's page: per outcome, one plot of each variant's estimate and interval, base marked.

The page opens offline (plain SVG, no script) and shows only released numbers: the rows
arrive suppressed (:func:`pipeline.workflows._sweep_numbers.released_rows`), and a variant whose
cumulative incidence was left out is drawn as a labelled gap, never as a point.
"""

from __future__ import annotations

from html import escape
from typing import TYPE_CHECKING, Any

from pipeline.outputs.report._html_cells import table
from pipeline.workflows._sweep_numbers import COLUMNS

if TYPE_CHECKING:
    from pipeline.workflows.sweep import SweepRun

_ROW, _LEFT, _WIDTH, _TOP = 24, 190, 420, 30


def _plot(outcome: str, rows: list[dict[str, Any]]) -> str:
    """A forest plot of the cumulative incidence at the horizon, one line per variant."""
    highs = [r["ci_high"] for r in rows if r["ci_high"] is not None]
    top = max(highs) if highs else 1.0
    top = top * 1.1 or 1.0

    def x(value: float) -> float:
        return _LEFT + _WIDTH * value / top

    height = _TOP + _ROW * len(rows) + 30
    parts = [
        f'<svg role="img" viewBox="0 0 {_LEFT + _WIDTH + 40} {height}" '
        f'aria-label="cumulative incidence of {escape(outcome)} by variant">',
        f'<line x1="{_LEFT}" y1="{_TOP - 10}" x2="{_LEFT}" y2="{height - 25}" stroke="#888"/>',
    ]
    for i, row in enumerate(rows):
        y = _TOP + _ROW * i
        base = row["is_base"] == "yes"
        label = escape(row["variant"]) + (" (base)" if base else "")
        weight = ' font-weight="bold"' if base else ""
        parts.append(f'<text x="4" y="{y + 4}" font-size="12"{weight}>{label}</text>')
        if row["cumulative_incidence"] is None:
            parts.append(
                f'<text x="{_LEFT + 6}" y="{y + 4}" font-size="11" fill="#666">'
                "not shown (small count)</text>"
            )
            continue
        low, high, mid = (x(row[k]) for k in ("ci_low", "ci_high", "cumulative_incidence"))
        colour = "#b23" if base else "#246"
        parts.append(
            f'<line x1="{low:.1f}" y1="{y}" x2="{high:.1f}" y2="{y}" stroke="{colour}" '
            'stroke-width="2"/>'
        )
        shape = (
            f'<rect x="{mid - 5:.1f}" y="{y - 5}" width="10" height="10" fill="{colour}"/>'
            if base
            else f'<circle cx="{mid:.1f}" cy="{y}" r="4" fill="{colour}"/>'
        )
        parts.append(shape)
    axis_y = height - 12
    for j in range(5):
        value = top * j / 4
        parts.append(
            f'<text x="{x(value):.1f}" y="{axis_y}" font-size="10" text-anchor="middle">'
            f"{value * 100:.1f}%</text>"
        )
    parts.append("</svg>")
    return "".join(parts)


def _text(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return f"{value:.4g}"
    return escape(str(value))


def render_sweep_html(run: SweepRun, released: list[dict[str, Any]], threshold: int) -> str:
    """The sweep's HTML page from the released rows."""
    sweep = run.sweep
    overrides = "".join(
        f"<li><b>{escape(v.name)}</b>: "
        + "; ".join(escape(f"{o.target} = {o.value}") for o in v.overrides)
        + "</li>"
        for v in sweep.variants
    )
    sections = []
    for outcome in sweep.outcomes:
        rows = [r for r in released if r["outcome"] == outcome]
        body = table(
            list(COLUMNS[3:]),
            [
                "<tr>" + "".join(f"<td>{_text(r[c])}</td>" for c in COLUMNS[3:]) + "</tr>"
                for r in rows
            ],
        )
        names = table(["variant"], [f"<tr><td>{escape(r['variant'])}</td></tr>" for r in rows])
        sections.append(
            f"<section><h2>{escape(outcome)}</h2>"
            "<p>Cumulative incidence at the horizon (Aalen-Johansen, death competing) with its "
            f"95% interval; the base is the square.</p>{_plot(outcome, rows)}"
            f"<div style='display:flex;gap:1em'>{names}{body}</div></section>"
        )
    shared = len(run.merged.shared)
    return (
        "<!doctype html><html lang='en'><head><meta charset='utf-8'>"
        f"<title>{escape(sweep.title)}: sweep {escape(sweep.name)}</title></head><body>"
        f"<h1>{escape(sweep.title)}</h1><p>Sweep <b>{escape(sweep.name)}</b> of "
        f"{escape(sweep.base.file.name)}: {len(sweep.variants)} variants. The engine ran "
        f"{len(run.merged.plan.stages)} stages instead of {run.merged.stages_alone}; "
        f"{shared} were shared by more than one variant.</p><ul>{overrides}</ul>"
        f"<p>Counts below {threshold} are shown as &lt;{threshold}; a larger count hidden so "
        "that a small one cannot be worked out (across all variants: gained and lost are "
        "differences of overlapping sets) as *; statistics of a hidden count are left out. "
        "Research use only.</p>" + "".join(sections) + "</body></html>\n"
    )
