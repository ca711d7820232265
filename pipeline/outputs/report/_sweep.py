"""The report's definition sensitivity section: per outcome, each variant's estimate and interval.

One section, drawn with the report's own styles and count cells, serves two pages: the sweep's
``sweep.html`` (the section alone in the report's page chrome) and the ``report.html`` of a
variant kept by ``ascertain sweep --keep``, where it sits between the report's results and its
definitions. Only released numbers are shown: the rows arrive suppressed
(:func:`pipeline.workflows._sweep_numbers.released_rows`), a hidden count shows as the report
marks one (``<N`` or ``*``, in a ``class="n"`` cell), and a variant whose cumulative incidence
was left out is drawn as a labelled gap, never as a point.
"""

from __future__ import annotations

from dataclasses import dataclass
from html import escape
from typing import Any

import polars as pl

from pipeline.outputs.report._html import cautions, page
from pipeline.outputs.report._html_cells import n_cell, table

SECTION = "sweep"
"""The section's id in the report (``_html.SECTIONS``) and its summary table's name."""

_ROW, _LEFT, _WIDTH, _TOP = 24, 200, 420, 30
_COUNTS = ("cohort", "prevalent", "at_risk", "incident", "gained", "lost")
_SHOWN = (
    ("variant", "Variant"),
    ("cohort", "Cohort"),
    ("prevalent", "Prevalent"),
    ("at_risk", "At risk"),
    ("incident", "Incident"),
    ("cumulative_incidence", "Cumulative incidence, %"),
    ("ci_low", "95% CI low"),
    ("ci_high", "95% CI high"),
    ("rate_per_1000py", "Rate per 1,000 PY"),
    ("rate_low", "Rate low"),
    ("rate_high", "Rate high"),
    ("gained", "Gained"),
    ("lost", "Lost"),
    ("jaccard", "Jaccard"),
    ("median_onset_shift_days", "Median onset shift, days"),
)
_PERCENT = ("cumulative_incidence", "ci_low", "ci_high")


@dataclass(frozen=True)
class SweepFacts:
    """What the section says about the sweep besides its numbers.

    Attributes:
        name: The sweep's name.
        title: Its title.
        base_file: The base study's file name.
        overrides: Per variant, its overrides as ``target = value`` sentences.
        stages_run: Stages the merged plan ran.
        stages_alone: Stages the variants would run one by one.
        shared: Stages shared by more than one variant.
        titles: Readable outcome titles.
    """

    name: str
    title: str
    base_file: str
    overrides: tuple[tuple[str, tuple[str, ...]], ...]
    stages_run: int
    stages_alone: int
    shared: int
    titles: dict[str, str]


def _plot(outcome: str, rows: list[dict[str, Any]], current: str | None) -> str:
    """A forest plot of the cumulative incidence at the horizon, one line per variant."""
    highs = [r["ci_high"] for r in rows if r["ci_high"] is not None]
    top = max(highs) * 1.1 if highs and max(highs) > 0 else 1.0

    def x(value: float) -> float:
        return _LEFT + _WIDTH * value / top

    height = _TOP + _ROW * len(rows) + 30
    parts = [
        f'<svg role="img" viewBox="0 0 {_LEFT + _WIDTH + 40} {height}" '
        f'aria-label="cumulative incidence of {escape(outcome)} by variant">',
        f'<line class="axis" x1="{_LEFT}" y1="{_TOP - 10}" x2="{_LEFT}" y2="{height - 25}"/>',
    ]
    for i, row in enumerate(rows):
        y = _TOP + _ROW * i
        base = row["is_base"] == "yes"
        label = escape(row["variant"]) + (" (this report)" if row["variant"] == current else "")
        weight = ' font-weight="bold"' if base else ""
        parts.append(f'<text x="4" y="{y + 4}" font-size="12"{weight}>{label}</text>')
        if row["cumulative_incidence"] is None:
            parts.append(
                f'<text class="tick" x="{_LEFT + 6}" y="{y + 4}">not shown (hidden count)</text>'
            )
            continue
        low, high, mid = (x(row[k]) for k in ("ci_low", "ci_high", "cumulative_incidence"))
        parts.append(f'<line class="ci" x1="{low:.1f}" y1="{y}" x2="{high:.1f}" y2="{y}"/>')
        parts.append(
            f'<rect class="dot" x="{mid - 5:.1f}" y="{y - 5}" width="10" height="10"/>'
            if base
            else f'<circle class="dot" cx="{mid:.1f}" cy="{y}" r="4"/>'
        )
    for j in range(5):
        value = top * j / 4
        parts.append(
            f'<text class="tick tick-x" x="{x(value):.1f}" y="{height - 12}">'
            f"{value * 100:.1f}%</text>"
        )
    parts.append("</svg>")
    return "".join(parts)


def text(column: str, value: Any) -> str:
    """A released value as the section and ``summary/sweep.csv`` show it."""
    if value is None:
        return ""
    if isinstance(value, float):
        return f"{value * 100:.2f}" if column in _PERCENT else f"{value:.4g}"
    return str(value)


def sweep_frame(released: list[dict[str, Any]]) -> pl.DataFrame:
    """The released rows as the report's summary table (text, as published)."""
    columns = ["outcome", *(c for c, _ in _SHOWN)]
    data = {c: [text(c, r[c]) or None for r in released] for c in columns}
    return pl.DataFrame(data, schema=dict.fromkeys(columns, pl.String))


def sweep_section(
    facts: SweepFacts, released: list[dict[str, Any]], threshold: int, current: str | None = None
) -> str:
    """The section's HTML: what was varied, then per outcome its plot and table.

    Args:
        facts: The sweep's description.
        released: The suppressed rows (:func:`released_rows`).
        threshold: The small-cell threshold the rows were suppressed with.
        current: The variant whose report holds the section (marked), if any.
    """
    overrides = "".join(
        f"<li><b>{escape(name)}</b>: {escape('; '.join(sentences))}</li>"
        for name, sentences in facts.overrides
    )
    parts = [
        f'<p class="about">Sweep <b>{escape(facts.name)}</b> of {escape(facts.base_file)}: '
        f"{len(facts.overrides)} variants of the base study, built in one run. The engine ran "
        f"{facts.stages_run} stages instead of {facts.stages_alone}; {facts.shared} were "
        f"shared by more than one variant.</p><ul>{overrides}</ul>"
    ]
    outcomes = list(dict.fromkeys(r["outcome"] for r in released))
    for outcome in outcomes:
        rows = [r for r in released if r["outcome"] == outcome]
        body = [
            ('<tr class="var">' if r["is_base"] == "yes" else "<tr>")
            + "".join(n_cell(text(c, r[c])) if c in _COUNTS else _plain(c, r) for c, _ in _SHOWN)
            + "</tr>"
            for r in rows
        ]
        parts.append(
            f"<h3>{escape(facts.titles.get(outcome, outcome))}</h3>"
            f"<figure>{_plot(outcome, rows, current)}</figure>"
            + table([h for _, h in _SHOWN], body)
        )
    parts.append(
        '<p class="note">Cumulative incidence at the horizon (Aalen-Johansen, death competing) '
        "with its 95% interval, the base (in bold) a square; rates with exact Poisson "
        "intervals. Gained and lost: incident cases only the variant or only the base has; "
        "Jaccard: the overlap of the two sets of incident cases. Counts below "
        f'{threshold} are shown as "&lt;{threshold}", a count hidden so that a small one '
        'cannot be worked out as "*" (all variants\' counts, and those of the reports of '
        "kept variants, are suppressed as one system); statistics of a hidden count are left "
        "out.</p>"
    )
    return "".join(parts)


def _plain(column: str, row: dict[str, Any]) -> str:
    if column == "variant":
        return f"<td>{escape(row['variant'])}</td>"
    return f'<td class="num">{escape(text(column, row[column]))}</td>'


def sweep_page(facts: SweepFacts, released: list[dict[str, Any]], threshold: int) -> str:
    """``sweep.html``: the section alone, in the report's page chrome."""
    return page(
        title=facts.title,
        eyebrow=f"Definition sweep · {facts.name}",
        meta=f"Base study {facts.base_file} · small-cell threshold {threshold}",
        cautions=cautions(
            threshold,
            [],
            "Only sweep.csv, this page and the reports of kept variants (keep/NAME/report.html "
            "and summary/) are suppressed: every other file of the sweep's folder holds raw "
            "counts and must not be shared.",
        ),
        sections=[(SECTION, "Definition sensitivity", sweep_section(facts, released, threshold))],
        footer="Written by ascertain sweep. The table is also in sweep.csv.",
    )
