"""The HTML page of the study report: sections, tables and the stylesheet.

Everything here formats tables that :mod:`._write` has already suppressed, so the HTML and
the summary CSVs cannot disagree. The page is one file with inline CSS and inline SVG only:
it must open on an offline analysis server and print on paper. Every string that comes from
data or from user files is escaped; count cells carry ``class="n"`` so tests can find them.
"""

from __future__ import annotations

from html import escape
from typing import Any

import polars as pl

from pipeline.outputs._matched import MATCHING_LINES
from pipeline.outputs.report._codes import codes_section
from pipeline.outputs.report._html_cells import n_cell as _n
from pipeline.outputs.report._html_cells import table as _table
from pipeline.outputs.report._html_cells import thousands as _thousands
from pipeline.outputs.report._html_rates import rates_section
from pipeline.outputs.report._html_results import (
    curves_section,
    dependence_section,
    exposure_table_one_section,
    incidence_section,
    table_one_section,
)
from pipeline.outputs.report._html_smr import smr_section
from pipeline.outputs.report._svg import (
    DEFINING_STEPS,
    Bar,
    Curve,
    FlowStep,
    flow_side,
    flow_title,
    render_bars,
    render_flow,
)

__all__ = ["OPTIONAL_SECTIONS", "SECTIONS", "assemble", "page"]

SECTIONS = (
    ("flow", "Patient flow"),
    ("table-one", "Table 1: baseline characteristics"),
    ("incidence", "Incidence"),
    ("curves", "Cumulative incidence curves"),
    ("rates", "Rates by age band"),
    ("combinations", "Outcome combinations"),
    ("dependence", "Pairwise dependence"),
    ("sweep", "Definition sensitivity"),
    ("definitions", "Definitions"),
    ("codes", "Codes matched by each definition"),
    ("quality", "Data quality"),
    ("manifest", "Manifest"),
)
"""Section ids and headings, in page order (the cautions box comes before them)."""

OPTIONAL_SECTIONS = ("rates", "codes", "sweep")
"""Sections shown only when the build has what they need (rates: ``persontime.parquet``;
codes: the files of ``ascertain codes`` in the build folder; sweep: a variant kept by
``ascertain sweep``, whose report the sweep writes)."""

CSS = """
:root{--ink:#1f2b2a;--muted:#5d6a67;--paper:#fbfaf6;--card:#ffffff;--line:#d9d4c8;
--accent:#2c6a64;--accent-soft:#e3eeeb;--compare:#8c7b5f;--warn-bg:#fbf2e2;--warn:#b7791f;
--serif:"Iowan Old Style","Palatino Linotype",Palatino,"Book Antiqua",Georgia,serif;
--sans:system-ui,-apple-system,"Segoe UI","Noto Sans","Liberation Sans",Arial,sans-serif;
--mono:ui-monospace,"SFMono-Regular",Menlo,Consolas,"Liberation Mono",monospace}
*{box-sizing:border-box}
body{margin:0;background:var(--paper);color:var(--ink);font:15px/1.55 var(--sans)}
main{max-width:1100px;margin:0 auto;padding:40px 36px 64px}
h1,h2,h3{font-family:var(--serif);font-weight:600;line-height:1.25;color:var(--ink)}
h1{font-size:30px;margin:4px 0 10px}
h2{font-size:22px;margin:0 0 14px;padding-bottom:6px;border-bottom:2px solid var(--accent)}
h3{font-size:17px;margin:22px 0 8px}
.eyebrow{margin:0;color:var(--accent);font-size:13px;letter-spacing:.08em;text-transform:uppercase}
.meta{margin:0;color:var(--muted)}
section{background:var(--card);border:1px solid var(--line);border-radius:8px;
padding:24px 28px;margin:22px 0}
.cautions{background:var(--warn-bg);border:1px solid var(--line);border-left:6px solid var(--warn);
border-radius:8px;padding:16px 24px;margin:22px 0}
.cautions h2{border:0;font-size:18px;margin:0 0 6px;padding:0}
.cautions ul{margin:0;padding-left:20px}
nav ol{columns:3;margin:0;padding-left:20px;color:var(--muted)}
nav a{color:var(--accent)}
div.wide{overflow-x:auto}
table{border-collapse:collapse;width:100%;font-size:13.5px;margin:8px 0 4px;
font-variant-numeric:tabular-nums}
th,td{padding:5px 10px;border-bottom:1px solid var(--line);text-align:left;vertical-align:top}
thead th{background:var(--accent-soft);font-weight:600;border-bottom:2px solid var(--accent)}
td.num,th.num{text-align:right}td.num{white-space:nowrap}
tr.var td:first-child{font-weight:600}
td.sub{padding-left:26px;color:var(--muted)}
.pct{color:var(--muted)}
.col{font:400 11.5px var(--mono);color:var(--muted);margin-left:6px}
.note{color:var(--muted);font-size:13px;margin:6px 0}
.hash{font-family:var(--mono);font-size:12px;word-break:break-all}
.about{margin:4px 0 10px;max-width:80ch}
dl.def{display:grid;grid-template-columns:max-content 1fr;gap:2px 14px;margin:0;font-size:13px}
dl.def dt{color:var(--muted)}dl.def dd{margin:0}
.figs{display:grid;grid-template-columns:repeat(auto-fill,minmax(320px,1fr));gap:18px}
figure{margin:0}figcaption{font-weight:600;margin-bottom:4px}
svg{width:100%;height:auto;font-family:var(--sans)}
svg.flow{max-width:860px}
.box{fill:var(--accent-soft);stroke:var(--accent);stroke-width:1.5}
.side{fill:#f6f3ec;stroke:var(--line);stroke-width:1.2}
.box-title{font-size:14px;font-weight:600;fill:var(--ink)}
.box-count{font-size:16px;font-weight:700;fill:var(--accent);text-anchor:end}
.box-note{font-size:12.5px;fill:var(--muted)}
.side-title{font-size:13px;font-weight:600;fill:var(--ink)}
.side-count{font-size:14px;font-weight:700;fill:var(--warn)}
.arrow,.link{stroke:var(--muted);stroke-width:1.4;fill:none}.link{stroke-dasharray:3 3}
.head{fill:var(--muted)}
.plot{fill:#fff;stroke:var(--line)}.grid{stroke:#ece8df}.axis{stroke:var(--muted)}
.tick{font-size:11px;fill:var(--muted)}.tick-y{text-anchor:end}.tick-x{text-anchor:middle}
.axis-label{font-size:12px;fill:var(--muted);text-anchor:middle}
.aj{fill:none;stroke:var(--accent);stroke-width:2.2}
.km{fill:none;stroke:var(--compare);stroke-width:1.6;stroke-dasharray:6 4}
.band{fill:var(--accent);fill-opacity:.16;stroke:none}
.swatch.band{height:12px;border-top:0;background:var(--accent);opacity:.16}
table.at-risk{font-size:12px;margin:2px 0 0}table.at-risk th{font-weight:600}
.legend{display:flex;gap:22px;font-size:13px;color:var(--muted);margin:4px 0 12px}
.swatch{display:inline-block;width:28px;height:0;border-top:3px solid var(--accent);
vertical-align:middle;margin-right:6px}.swatch.km{border-top:2px dashed var(--compare)}
.bar{fill:var(--accent)}.bar-label{font-size:13px;fill:var(--ink)}
svg.bars{max-width:900px;margin-bottom:8px}
td.pair{min-width:190px}
.bar-value{font-size:13px;font-weight:600;fill:var(--ink)}
.dot{fill:var(--accent)}.ci{stroke:var(--accent);stroke-width:1.6}
footer{color:var(--muted);font-size:12.5px;margin-top:28px}
@media print{@page{margin:16mm 14mm}
body{background:#fff;font-size:10pt}main{max-width:none;padding:0}
section,.cautions{border:0;padding:0;margin:0 0 14pt;break-inside:auto}
h2{break-after:avoid}figure,svg,tr{break-inside:avoid}nav{display:none}
thead{display:table-header-group}}
"""


def _flow(flow: pl.DataFrame, threshold: int) -> str:
    rows = [
        {
            k: _thousands(v) if k in ("patients_before", "removed", "remaining") else v
            for k, v in r.items()
        }
        for r in flow.iter_rows(named=True)
    ]
    steps = [
        FlowStep(
            r["step"],
            r["description"],
            r["patients_before"],
            r["removed"],
            r["remaining"],
            removes=r["step"] not in DEFINING_STEPS,
            title=flow_title(r["step"]),
            side=flow_side(r["step"]),
        )
        for r in rows
    ]
    sets = [i for i, r in enumerate(rows) if r["step"] in MATCHING_LINES]
    return render_flow(steps, cohort=sets[0] - 1 if sets else None) + (
        f'<p class="note">Counts below {threshold} are shown as "&lt;{threshold}". Because each '
        "box's count is the previous count minus the exclusions, a hidden exclusion would follow "
        "by subtraction; so in each step where one of the three numbers (before, excluded, "
        'remaining) is hidden, at least one more is hidden too, shown as "*". The cohort size '
        "and the source population are hidden only when nothing else can protect a small "
        "count.</p>"
    )


def _combo_label(name: str, titles: dict[str, str]) -> str:
    return (
        "No incident outcome"
        if name == "none"
        else " + ".join(titles.get(p, p) for p in name.split("+"))
    )


def _combinations(frame: pl.DataFrame, titles: dict[str, str]) -> str:
    rows = list(frame.iter_rows(named=True))
    bars = [
        Bar(
            _combo_label(r["combination"], titles),
            int(r["n"]) if r["n"].isdigit() else None,
            _thousands(r["n"]),
        )
        for r in rows
    ]
    table = _table(
        ["Combination", "Outcomes", "Patients, n"],
        (
            f"<tr><td>{escape(_combo_label(r['combination'], titles))}</td>"
            f'<td class="num">{r["outcomes"]}</td>{_n(r["n"])}</tr>'
            for r in rows
        ),
    )
    return (
        render_bars(bars)
        + table
        + (
            '<p class="note">Patients at risk of every outcome at index, each counted once under '
            "the exact set of outcomes that became incident within the horizon. Suppressed counts "
            "have no bar.</p>"
        )
    )


def _definitions(definitions: list[dict[str, str]]) -> str:
    if not definitions:
        return '<p class="note">The definition files could not be read; see the notes above.</p>'
    return "".join(
        f'<h3>{escape(d["title"])} <span class="pct">({escape(d["name"])})</span></h3>'
        f'<p class="about">{escape(d["about"])}</p><p class="about">{escape(d["rules"])}</p>'
        '<dl class="def"><dt>File</dt>'
        f'<dd class="hash">{escape(d["path"])}</dd><dt>SHA-256</dt>'
        f'<dd class="hash">{escape(d["sha256"])}</dd></dl>'
        for d in definitions
    )


def _quality(frame: pl.DataFrame) -> str:
    rows = [
        f"<tr><td>{escape(r['source_table'])}</td><td>{escape(r['outcome'])}</td>"
        f"<td>{escape(r['reason'])}</td>{_n(r['n_rows'])}</tr>"
        for r in frame.iter_rows(named=True)
    ]
    return _table(["Source table", "Status", "Reason", "Rows"], rows, [3]) + (
        '<p class="note">Every row read from the extract is either used or set aside for one '
        "reason; small row counts are suppressed like patient counts.</p>"
    )


def _manifest(manifest: dict[str, Any]) -> str:
    inputs = [
        f'<tr><td>{escape(kind)}</td><td class="hash">{escape(str(e.get("path", "")))}</td>'
        f'<td class="num">{int(e.get("bytes", 0)):,}</td>'
        f'<td class="hash">{escape(str(e.get("sha256", "")))}</td></tr>'
        for kind in ("study", "definitions", "extract")
        for e in manifest.get(kind, [])
    ]
    outputs = [
        f'<tr><td>{escape(name)}</td><td class="hash">{escape(str(h))}</td></tr>'
        for name, h in sorted(manifest.get("outputs", {}).items())
    ]
    engine = manifest.get("engine", {})
    versions = (
        f"ascertain {manifest.get('tool_version', '?')}, {engine.get('name', '?')} "
        f"{engine.get('version', '?')}, Python {manifest.get('python', '?')}"
    )
    return (
        f'<dl class="def"><dt>Plan hash</dt><dd class="hash">'
        f"{escape(str(manifest.get('plan_hash', '')))}</dd><dt>Versions</dt>"
        f"<dd>{escape(versions)}</dd></dl><h3>Inputs</h3>"
        + _table(["Kind", "Path", "Bytes", "SHA-256"], inputs, [2])
        + "<h3>Outputs of the build</h3>"
        + _table(["File", "SHA-256"], outputs, [])
    )


REPORT_RELEASED = (
    "Only this report and summary/ are suppressed: cohort.parquet and the build files next to "
    "it hold raw counts and must not be shared."
)
"""What the report's cautions say is released; another page names its own released files."""


def _cautions(threshold: int, notes: list[str], released: str = REPORT_RELEASED) -> str:
    items = [
        "For research use only.",
        "Not for clinical decisions about individual patients.",
        "Validate every condition definition locally before relying on it.",
        f'Counts below {threshold} are suppressed (shown as "&lt;{threshold}"); a count that '
        'would let one be worked out by subtraction is suppressed too (shown as "*"); '
        "percentages, rates and intervals from suppressed counts are not shown. " + released,
        "Follow your local data-governance rules before sharing this report.",
    ]
    notes_html = "".join(f"<li>{escape(n)}</li>" for n in notes)
    return (
        '<aside class="cautions" id="cautions"><h2>Cautions</h2><ul>'
        + "".join(f"<li>{i}</li>" for i in items)
        + notes_html
        + "</ul></aside>"
    )


def assemble(
    *,
    study: Any,
    manifest: dict[str, Any],
    run: dict[str, Any],
    summaries: dict[str, pl.DataFrame],
    quality: pl.DataFrame,
    curves: dict[str, tuple[Any, ...]],
    at_risk: dict[str, str],
    labels: dict[str, str],
    sections: dict[str, str] | None = None,
) -> str:
    """Put the whole page together from the suppressed tables.

    Args:
        study: The study facts (:class:`._write.Study`).
        manifest: The build's manifest.
        run: The build's run record (for the build date only).
        summaries: The suppressed summary tables by name.
        quality: The suppressed quality log.
        curves: Per outcome with shown events, ``(aj_times, aj, band_low, band_high,
            km_times, 1 - km)``, times in years (``OutcomeCurves.years``).
        at_risk: Per outcome with a curve, its numbers-at-risk table as published HTML.
        labels: Readable labels of the analysis-table columns.
        sections: The HTML of optional sections made elsewhere, by id (``sweep``), suppressed
            by their maker in one system with the page's counts.

    Returns:
        The HTML text.
    """
    t, titles = study.threshold, study.titles
    horizon = max((float(c[0].max()) for c in curves.values()), default=1.0)
    drawn = {
        o: Curve(titles.get(o, o), aj_t, aj, km_t, km, horizon=horizon, aj_low=lo, aj_high=hi)
        for o, (aj_t, aj, lo, hi, km_t, km) in curves.items()
    }
    built = str(run.get("finished_utc", "unknown"))[:10]
    version = manifest.get("tool_version", "?")
    body = {
        "flow": _flow(summaries["flow"], t),
        "table-one": (
            exposure_table_one_section(summaries["table_one_by_exposure"], labels)
            if "table_one_by_exposure" in summaries
            else ""
        )
        + "".join(
            table_one_section(summaries["table_one"], o, titles.get(o, o), labels)
            for o in study.outcomes
        ),
        "incidence": incidence_section(summaries["incidence"]),
        "curves": curves_section(drawn, study.outcomes, titles, t, at_risk),
        "rates": rates_section(
            summaries["rates"],
            summaries["standardised_rates"],
            study.outcomes,
            titles,
        )
        + smr_section(summaries.get("smr"), study.reference, titles)
        if "rates" in summaries
        else "",
        "combinations": _combinations(summaries["combinations"], titles),
        "dependence": dependence_section(summaries["dependence"], titles),
        "definitions": _definitions(study.definitions),
        "codes": codes_section(summaries.get("codes_matched"), summaries.get("codes_near_misses")),
        "sweep": (sections or {}).get("sweep", ""),
        "quality": _quality(quality),
        "manifest": _manifest(manifest),
    }
    shown = [(i, h) for i, h in SECTIONS if body[i] or i not in OPTIONAL_SECTIONS]
    return page(
        title=study.title,
        eyebrow=f"Study report · {study.name}",
        meta=f"Built {built} with ascertain {version} · small-cell threshold {t}",
        cautions=_cautions(t, study.notes),
        sections=[(i, h, body[i]) for i, h in shown],
        footer="Written by ascertain report from the build's output folder. The summary "
        "tables are also in summary/*.csv.",
    )


def page(
    *,
    title: str,
    eyebrow: str,
    meta: str,
    cautions: str,
    sections: list[tuple[str, str, str]],
    footer: str,
) -> str:
    """The report's page chrome around its sections: the one look of every page ascertain writes.

    Args:
        title: The page's title (escaped here).
        eyebrow: The line above the title (escaped here).
        meta: The line below the title (escaped here).
        cautions: The cautions box, as HTML (:func:`cautions`).
        sections: ``(id, heading, body HTML)`` in page order.
        footer: The footer's sentence (its HTML special characters escaped here).
    """
    toc = "".join(f'<li><a href="#{i}">{escape(h)}</a></li>' for i, h, _ in sections)
    return (
        '<!doctype html><html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{escape(title)}</title><style>{CSS}</style></head><body><main>"
        f'<header><p class="eyebrow">{escape(eyebrow)}</p>'
        f'<h1>{escape(title)}</h1><p class="meta">{escape(meta)}</p></header>'
        + cautions
        + f"<nav><ol>{toc}</ol></nav>"
        + "".join(
            f'<section id="{i}"><h2>{escape(h)}</h2>{body}</section>' for i, h, body in sections
        )
        + f"<footer>{escape(footer, quote=False)}</footer></main></body></html>\n"
    )


def cautions(threshold: int, notes: list[str], released: str = REPORT_RELEASED) -> str:
    """The cautions box every released page opens with (research use, suppression, sharing).

    ``released`` says which files are suppressed (and which are not) for this page.
    """
    return _cautions(threshold, notes, released)
