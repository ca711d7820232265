"""``ascertain profile``: the first look at a new extract, written as JSON and one HTML page.

The profile is patient-level detail for use inside the secure environment: it is there to find
orphan rows, unreadable dates and rare codes, so it shows small counts as they are, and the
first and last dates of each table are single patients' dates. It is labelled so on every
output (:data:`PATIENT_LEVEL`). Measure values are given only as percentiles of groups of at
least ``threshold`` values, never as minimum or maximum, so the measure table holds no single
patient's value.
"""

from __future__ import annotations

import json
from html import escape
from pathlib import Path
from typing import Any

from rich.table import Table

from pipeline.engine import DuckDBEngine
from pipeline.errors import AscertainError, ExtractError
from pipeline.extract import ExtractTable, database_source, discover_extract, open_extract
from pipeline.extract.schema import all_sources
from pipeline.outputs._ownership import PROFILE, check_folder, install, staging
from pipeline.workflows._profile_queries import profile_tables
from pipeline.workflows.prepare import BuildOptions, make_engine

ALL_TABLES = all_sources()
PATIENT_LEVEL = (
    "Patient-level detail for use inside the secure environment: small counts are shown as "
    "they are, and first and last dates are single patients' dates. Do not release it."
)
"""The label every profile output carries (JSON, HTML page and terminal)."""


def profile_extract(folder: Path | str, *, threshold: int = 5) -> dict[str, Any]:
    """Profile the canonical tables found in an extract (patients must be there).

    Args:
        folder: The extract folder, site mapping file, or database connection URI.
        threshold: Smallest number of numeric values of a measure and unit whose percentiles
            are given (the study default small-cell threshold is 5).

    Raises:
        AscertainError: ``threshold`` is below 1.
        ExtractError: No patients table, or a table that lacks required columns.
    """
    if threshold < 1:
        raise AscertainError(f"the threshold must be at least 1, got {threshold}")
    database = database_source(folder)
    if database is not None:
        optional = frozenset(t.name for t in ALL_TABLES if t.name != "patients")
        with open_extract(folder, ALL_TABLES, optional=optional) as opened:
            found = opened.tables
            profile = _profile(found, threshold)
        # The database and schema only: the mapping's folder or the server would say more.
        profile["extract"] = f"{database.database}.{database.schema}"
        profile["missing_tables"] = [t.name for t in ALL_TABLES if t.name not in found]
        return profile
    folder = Path(folder)
    found = {}
    missing = []
    for table in ALL_TABLES:
        try:
            found.update(discover_extract(folder, (table,)))
        except ExtractError as err:
            if table.name == "patients" or err.code != "missing-table":
                raise
            missing.append(table.name)
    profile = _profile(found, threshold)
    # Its name only: a full path names the machine it was made on.
    profile["extract"] = folder.resolve().name
    profile["missing_tables"] = missing
    return profile


def _profile(found: dict[str, ExtractTable], threshold: int) -> dict[str, Any]:
    sources = tuple(t for t in ALL_TABLES if t.name in found)
    # No study, so no engine settings but the machine's: DuckDB with its defaults.
    engine = make_engine(BuildOptions(), threads=None, memory_limit=None)
    assert isinstance(engine, DuckDBEngine)  # the default options name DuckDB
    profile = profile_tables(engine, sources, found, threshold=threshold)
    profile["release"] = PATIENT_LEVEL
    profile["percentiles_from"] = threshold
    return profile


def _bars(per_year: dict[str, int]) -> str:
    """An inline SVG bar chart of rows per year that always fits the page's width.

    The chart is drawn in a fixed coordinate width (a ``viewBox``) and scaled to the width of
    the page, so ninety birth years fit as well as five visit years. Years missing between the
    first and the last get an empty bar, so the axis is a true time axis. Years are labelled in
    full; when they would crowd, only every second, fifth or tenth year is labelled (each bar
    still names its year and count on hover).
    """
    if not per_year:
        return ""
    counts = dict(per_year)
    if all(year.isdigit() for year in counts):
        first, last = min(map(int, counts)), max(map(int, counts))
        counts = {str(y): per_year.get(str(y), 0) for y in range(first, last + 1)}
    view_width, height, label_space = 600, 60, 14
    slot = view_width / len(counts)
    # A full year at font size 9 is about 22 units wide; label every step-th bar so they never
    # overlap, with steps that land on round years.
    step = next(s for s in (1, 2, 5, 10, 20, 50, 100, len(counts)) if s * slot >= 26)
    top = max(counts.values()) or 1
    bars = []
    for i, (year, n) in enumerate(sorted(counts.items())):
        h = round(height * n / top, 2)
        x = round(i * slot, 2)
        bars.append(
            f'<rect x="{x}" y="{height - h}" width="{round(slot * 0.8, 2)}" height="{h}" '
            f'fill="#3d7a74"><title>{escape(year)}: {n:,}</title></rect>'
        )
        if (int(year) if year.isdigit() else i) % step == 0:
            bars.append(
                f'<text x="{round(x + slot * 0.4, 2)}" y="{height + 11}" font-size="9" '
                f'text-anchor="middle">{escape(year)}</text>'
            )
    box = f"-12 0 {view_width + 24} {height + label_space}"
    return (
        f'<svg viewBox="{box}" width="100%" style="max-width:{view_width + 24}px" role="img" '
        f'aria-label="rows per year">{"".join(bars)}</svg>'
    )


def _rows_table(rows: list[dict[str, Any]], columns: list[str]) -> str:
    head = "".join(f"<th>{escape(c)}</th>" for c in columns)
    body = "".join(
        "<tr>" + "".join(f"<td>{escape(_fmt(r.get(c)))}</td>" for c in columns) + "</tr>"
        for r in rows
    )
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _fmt(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.4g}"
    if isinstance(value, int):
        return f"{value:,}"
    return str(value)


_CSS = (
    "body{font-family:system-ui,sans-serif;margin:2rem auto;max-width:60rem;color:#1d2b2a}"
    "h1,h2{font-family:Georgia,serif}table{border-collapse:collapse;margin:.5rem 0 1.5rem}"
    "td,th{border-bottom:1px solid #d8e2e0;padding:.2rem .6rem;text-align:left}"
    ".note{background:#fbf3e4;border-left:4px solid #b7791f;padding:.5rem 1rem}"
)


def render_profile_html(profile: dict[str, Any]) -> str:
    """One self-contained page (inline CSS and SVG, no network)."""
    parts = [
        "<!doctype html><html lang=en><head><meta charset=utf-8>",
        f"<title>Extract profile</title><style>{_CSS}</style></head><body>",
        f"<h1>Extract profile</h1><p>{escape(profile['extract'])}</p>",
        f'<p class="note">{escape(profile["release"])} Measure values are percentiles of at '
        f"least {profile['percentiles_from']} values. Research use only; follow local "
        "data-governance rules.</p>",
    ]
    for name, table in profile["tables"].items():
        facts = {k: v for k, v in table.items() if k != "rows_per_year"}
        parts.append(f"<h2>{escape(name)}</h2>")
        # One fact per row: a table's facts side by side are wider than the page.
        facts_rows = [{"fact": k.replace("_", " "), "value": v} for k, v in facts.items()]
        parts.append(_rows_table(facts_rows, ["fact", "value"]))
        if table["rows_per_year"]:
            what = "birth year" if name == "patients" else "year"
            parts.append(f"<p>Rows per {what}</p>{_bars(table['rows_per_year'])}")
    if profile.get("missing_tables"):
        parts.append(f"<p>Tables not found: {escape(', '.join(profile['missing_tables']))}</p>")
    for key, columns in (
        ("diagnosis_codes", ["code_system", "code", "rows"]),
        ("prescription_codes", ["code_system", "code", "rows"]),
        ("measures", ["measure", "unit", "rows", "numeric", "p5", "p25", "p50", "p75", "p95"]),
    ):
        if key in profile:
            parts.append(f"<h2>{escape(key.replace('_', ' '))}</h2>")
            parts.append(_rows_table(profile[key], columns))
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def check_profile_folder(extract: Path | str, out: Path) -> None:
    """Refuse, before any work, an ``out`` that is not new, empty or a previous profile's.

    Raises:
        OutputFolderError: ``out`` holds foreign files or overlaps the extract.
    """
    # A connection URI names nothing on this machine that the folder could overlap.
    inputs = [] if isinstance(extract, str) else [("extract", extract)]
    check_folder(out, PROFILE, inputs=inputs)


def write_profile(profile: dict[str, Any], out: Path) -> list[Path]:
    """Write ``profile.json`` and ``profile.html`` into ``out``, listed in its record.

    ``out`` must be new, empty or a previous profile's folder; only the files a previous
    profile wrote there are replaced (see :mod:`pipeline.outputs._ownership`).

    Raises:
        OutputFolderError: ``out`` holds files ascertain did not write there.
    """
    names = ["profile.json", "profile.html"]
    with staging(out) as staged:
        text = json.dumps(profile, indent=2, sort_keys=True, default=str) + "\n"
        (staged / "profile.json").write_text(text, "utf-8")
        (staged / "profile.html").write_text(render_profile_html(profile), encoding="utf-8")
        install(staged, out, PROFILE, names)
    return [out / name for name in names]


def _cell(value: object) -> str:
    if value is None:
        return "-"
    return f"{value:,}" if isinstance(value, int) else str(value)


_TABLE_COLUMNS = {
    "rows": "rows",
    "first_date": "first date",
    "last_date": "last date",
    "unreadable_dates": "unreadable dates",
    "missing_dates": "missing dates",
    "orphan_rows": "orphans",
    "rows_without_patient": "no patient",
}


def profile_table(profile: dict[str, Any], title: str) -> Table:
    """The terminal summary: one line per extract table, its rows, dates and unusable rows."""
    table = Table(title=title)
    table.add_column("table")
    for column in _TABLE_COLUMNS.values():
        table.add_column(column, justify="right")
    for name, facts in profile["tables"].items():
        table.add_row(name, *(_cell(facts.get(key)) for key in _TABLE_COLUMNS))
    return table


def profile_notes(profile: dict[str, Any]) -> list[str]:
    """Lines under the terminal summary: rows the reader set aside, duplicate patient ids."""
    lines = [
        f"{name}: {found['rows']:,} set aside: {reason} (first at {found['first']})"
        for name, facts in profile["tables"].items()
        for reason, found in facts.get("set_aside_by_reader", {}).items()
    ]
    for duplicate in profile["tables"]["patients"].get("duplicate_patient_ids", []):
        where = ", ".join(duplicate["where"])
        lines.append(
            f"warning: patient id {duplicate['patient_id']} on {duplicate['rows']} rows: {where}"
        )
    return lines
