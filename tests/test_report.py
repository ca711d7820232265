"""The study report: one offline HTML file plus suppressed summary CSVs.

Two builds are used: the demo study (large counts, nothing in the flow is suppressed) and the
demo study on the hand-made extract (29 patients, so most counts are small).
"""

from __future__ import annotations

import csv
import json
import re
import shutil
import subprocess
from collections.abc import Callable
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from scipy import linalg

from pipeline.outputs.report import write_report
from pipeline.outputs.report._html import OPTIONAL_SECTIONS, SECTIONS
from pipeline.workflows.build import BuildOptions, build_study

from .conftest import DEMO_STUDY, HANDMADE, ROOT
from .helpers import require

SUMMARIES = ("combinations", "dependence", "flow", "incidence", "table_one")
COUNT_COLUMNS = {
    "combinations": ("n",),
    "dependence": ("n", "both", "first_only", "second_only", "neither"),
    "flow": ("patients_before", "removed", "remaining"),
    "incidence": ("at_risk", "events"),
    "table_one": ("n", "missing"),
}
SMALL = {"1", "2", "3", "4"}
HIDDEN = "<5"  # a small count
PROTECTING = "*"  # a larger count hidden so that a small one cannot be recovered
MARKERS = (HIDDEN, PROTECTING)


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("demo") / "out"
    build_study(DEMO_STUDY, BuildOptions(out=out))
    # The repository's study is too far from tmp_path for the manifest to record where it is.
    write_report(out, DEMO_STUDY)
    return out


@pytest.fixture(scope="module")
def small(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("small") / "out"
    build_study(DEMO_STUDY, BuildOptions(extract=HANDMADE, out=out))
    write_report(out, DEMO_STUDY)
    return out


class _Page(HTMLParser):
    """Collects h2 headings, count cells (class "n") and flow numbers (data-field)."""

    def __init__(self) -> None:
        super().__init__()
        self.headings: list[str] = []
        self.counts: list[str] = []
        self.flow: dict[tuple[str, str], str] = {}
        self._open: list[tuple[str, dict[str, str | None], list[str]]] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = dict(attrs)
        if tag == "h2" or "n" in (a.get("class") or "").split() or "data-field" in a:
            self._open.append((tag, a, []))

    def handle_data(self, data: str) -> None:
        for _, _, text in self._open:
            text.append(data)

    def handle_endtag(self, tag: str) -> None:
        if self._open and self._open[-1][0] == tag:
            _, a, parts = self._open.pop()
            text = "".join(parts).strip()
            if tag == "h2":
                self.headings.append(text)
            elif "data-field" in a:
                self.flow[(str(a["data-step"]), str(a["data-field"]))] = text
            else:
                self.counts.append(text)


def _page(folder: Path) -> _Page:
    page = _Page()
    page.feed((folder / "report.html").read_text(encoding="utf-8"))
    return page


def _rows(path: Path) -> list[dict[str, str]]:
    with path.open(encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def test_files_are_written(demo: Path) -> None:
    assert (demo / "report.html").is_file()
    assert sorted(p.stem for p in (demo / "summary").iterdir()) == sorted(SUMMARIES)


@pytest.mark.parametrize("which", ["demo", "small"])
def test_report_is_self_contained(which: str, request: pytest.FixtureRequest) -> None:
    html = (request.getfixturevalue(which) / "report.html").read_text(encoding="utf-8").lower()
    for banned in ("http://", "https://", "<script", "@import", "url(", "<link", "<img", "src="):
        assert banned not in html, banned
    assert "@media print" in html


def test_every_section_heading_is_present(demo: Path) -> None:
    # The rates section needs persontime.parquet, which this build does not write
    # (tests/test_report_rates.py covers a build with it).
    shown = [title for i, title in SECTIONS if i not in OPTIONAL_SECTIONS]
    assert _page(demo).headings == ["Cautions", *shown]


def test_flow_diagram_numbers_equal_the_attrition_log(demo: Path) -> None:
    flow = _page(demo).flow
    attrition = _rows(demo / "attrition.csv")
    for row in attrition:
        assert int(flow[(row["step"], "remaining")].replace(",", "")) == int(row["remaining"])
        # The extract and the source population remove nobody by definition: no side box.
        if row["step"] not in ("patients_in_extract", "source_population"):
            assert int(flow[(row["step"], "removed")].replace(",", "")) == int(row["removed"])
    assert _rows(demo / "summary" / "flow.csv") == attrition  # nothing below 5 in the demo


def test_flow_boxes_are_labelled_not_named(demo: Path) -> None:
    html = (demo / "report.html").read_text(encoding="utf-8")
    assert ">Patients in the extract<" in html
    assert ">With an index date<" in html
    assert ">Alive at index<" in html
    assert "After alive_at_index" not in html


def test_small_cohort_has_no_small_count_in_any_csv(small: Path) -> None:
    hidden = 0
    for name, columns in COUNT_COLUMNS.items():
        for row in _rows(small / "summary" / f"{name}.csv"):
            for column in columns:
                assert row[column] not in SMALL, (name, column, row)
                hidden += row[column] in MARKERS
    assert hidden > 20  # the fixture really has small cells


def test_small_cohort_has_no_small_count_in_the_html(small: Path) -> None:
    page = _page(small)
    shown = [text.replace(",", "") for text in [*page.counts, *page.flow.values()]]
    assert len(page.counts) > 100
    assert not SMALL & set(shown)
    assert HIDDEN in shown


def test_small_cohort_flow_matches_the_flow_csv(small: Path) -> None:
    flow = _page(small).flow
    for row in _rows(small / "summary" / "flow.csv"):
        assert flow[(row["step"], "remaining")].replace(",", "") == row["remaining"]


def test_flow_suppression_cannot_be_undone_by_subtraction(small: Path) -> None:
    published = _rows(small / "summary" / "flow.csv")
    raw = _rows(small / "attrition.csv")
    # One quantity per count: remaining of step i is patients_before of step i + 1.
    names = ["before_0"] + [f"{k}_{i}" for i in range(len(raw)) for k in ("removed", "rem")]
    value, text = {}, {}
    for i, (p, r) in enumerate(zip(published, raw, strict=True)):
        before = "before_0" if i == 0 else f"rem_{i - 1}"
        assert text.get(before, p["patients_before"]) == p["patients_before"]
        for name, column in (
            (before, "patients_before"),
            (f"removed_{i}", "removed"),
            (f"rem_{i}", "remaining"),
        ):
            value[name], text[name] = int(r[column]), p[column]
            if p[column] == HIDDEN:
                assert 0 < int(r[column]) < 5
            elif p[column] == PROTECTING:
                assert int(r[column]) == 0 or int(r[column]) >= 5
            else:
                assert int(p[column]) == int(r[column])
    relations = [
        {("before_0" if i == 0 else f"rem_{i - 1}"): 1, f"removed_{i}": -1, f"rem_{i}": -1}
        for i in range(len(raw))
    ]
    hidden = [n for n in names if text[n] in MARKERS]
    assert hidden
    matrix = np.array([[rel.get(n, 0) for n in hidden] for rel in relations], dtype=float)
    basis = linalg.null_space(matrix)
    for k, name in enumerate(hidden):  # a hidden count fixed by the relations is recoverable
        assert np.linalg.norm(basis[k]) > 1e-9, name


def test_estimates_from_hidden_counts_are_not_shown(small: Path) -> None:
    for row in _rows(small / "summary" / "incidence.csv"):
        if {row["events"], row["at_risk"]} & set(MARKERS):
            assert row["cumulative_incidence_percent"] == row["rate_per_1000_py"] == ""
            assert row["crude_percent"] == row["ci_high_percent"] == ""
    for row in _rows(small / "summary" / "dependence.csv"):
        if {row["both"], row["first_only"], row["second_only"], row["neither"]} & set(MARKERS):
            assert row["odds_ratio"] == row["phi"] == row["oe_ratio"] == row["expected"] == ""


def test_curves_are_coarsened_and_say_so(demo: Path) -> None:
    html = (demo / "report.html").read_text(encoding="utf-8")
    assert "each step stands for at least 5 events" in html
    # every corner of a drawn curve is a grid day (30, 60, ...) or the horizon, in x pixels
    days_per_px = 1461 / (360 - 52 - 14)
    for path in re.findall(r'<path d="(M[^"]*)" class="(?:aj|km)"/>', html):
        xs = [float(x) for x in re.findall(r"H([0-9.]+)", path)]
        days = [(x - 52) * days_per_px for x in xs]
        assert all(min(d % 30, 30 - d % 30) < 3 or d > 1458 for d in days), days


def test_report_is_deterministic(demo: Path) -> None:
    before = {p.name: p.read_bytes() for p in [demo / "report.html", *(demo / "summary").iterdir()]}
    write_report(demo, DEMO_STUDY)
    after = {p.name: p.read_bytes() for p in [demo / "report.html", *(demo / "summary").iterdir()]}
    assert before == after


def test_report_escapes_data_and_survives_a_missing_study(small: Path, tmp_path: Path) -> None:
    copy = tmp_path / "copy"
    shutil.copytree(small, copy)
    attrition = (copy / "attrition.csv").read_text(encoding="utf-8")
    (copy / "attrition.csv").write_text(
        attrition.replace("sex recorded as F or M", "sex <b>F</b> & M"), encoding="utf-8"
    )
    manifest = json.loads((copy / "manifest.json").read_text(encoding="utf-8"))
    manifest["locations"]["study_from_output"] = "../gone.yaml"
    (copy / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    write_report(copy)
    html = (copy / "report.html").read_text(encoding="utf-8")
    assert "<b>F</b>" not in html
    assert "sex &lt;b&gt;F&lt;/b&gt; &amp; M" in html
    assert "could not be read" in html


def _chromium() -> str | None:
    if Path("/usr/bin/chromium").exists():
        return "/usr/bin/chromium"
    return shutil.which("chromium")


def test_report_renders_in_headless_chromium(demo: Path, tmp_path: Path) -> None:
    browser = _chromium()
    require(browser, "no chromium: install the Debian package (apt-get install -y chromium)")
    assert browser is not None
    artifacts = ROOT / "test-artifacts"
    artifacts.mkdir(exist_ok=True)
    png = artifacts / "report.png"
    png.unlink(missing_ok=True)
    command = [
        browser,
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={tmp_path / 'profile'}",
        f"--screenshot={png}",
        "--window-size=1200,3000",
        (demo / "report.html").as_uri(),
    ]
    subprocess.run(command, check=True, timeout=90, capture_output=True)
    assert png.is_file()
    assert png.stat().st_size > 10_000


def test_report_command(small: Path) -> None:
    from typer.testing import CliRunner

    from pipeline.cli import app

    result = CliRunner().invoke(app, ["report", str(small)])
    assert result.exit_code == 0, result.output
    assert str(small / "report.html") in result.output
    missing = CliRunner().invoke(app, ["report", str(small / "nowhere")])
    assert missing.exit_code == 2


def test_table_one_names_covariates_by_their_label(
    tmp_path: Path, study_copy: Callable[[str], Path]
) -> None:
    # bmi gets a label in the study; hba1c falls back to its documented meaning and unit.
    text = DEMO_STUDY.read_text(encoding="utf-8")
    plain = "  bmi: {latest: bmi, window: [-730, 0]}"
    assert plain in text
    label = "BMI, latest in the two years before index, kg/m²"
    study = study_copy(text.replace(plain, plain[:-1] + f', label: "{label}"}}'))
    out = tmp_path / "out"
    build_study(study, BuildOptions(extract=HANDMADE, out=out))
    write_report(out, study)
    html = (out / "report.html").read_text(encoding="utf-8")
    assert label in html
    assert "Hba1c" in html or "HbA1c" in html
    # a condition is named by its title (its label): as a covariate, prevalent, by incidence
    assert "<td>Hypertension on or before the index date, n (%)" in html
    assert "<td>Heart failure on or before the index date, n (%)" in html
    assert "<h3>By incident Heart failure</h3>" in html
    assert "<th class=num>SMD</th>" in html


def _first_cells(html: str) -> list[str]:
    """The first cell of every table row, as text, without the column-name tag Table 1 adds."""
    html = re.sub(r'<span class="col">[^<]*</span>', "", html)
    cells = [re.search(r"<t[dh][^>]*>(.*?)</t[dh]>", row, re.S) for row in html.split("<tr")[1:]]
    return [re.sub(r"<[^>]+>", " ", c.group(1)).strip() for c in cells if c]


def test_every_table_row_names_things_in_words(demo: Path) -> None:
    # Issue 20: rows say what they count, by the condition's title or the covariate's meaning
    # (the same labels Table 1 uses), never by a bare outcome name or a generic phrase.
    html = (demo / "report.html").read_text(encoding="utf-8")
    firsts = _first_cells(html)
    assert len(firsts) > 100  # Table 1 three times, incidence, combinations, dependence, ...
    outcome = re.compile(r"\b(type2_diabetes|ckd|heart_failure)\b")
    assert [c for c in firsts if outcome.search(c)] == []
    assert "matching records" not in html
    # The demo's unlabelled count covariate, in the words of `check --explain` (demo spec §5).
    visits = (
        "Number of records of an encounter of any type from 365 days before index to 1 day "
        "before index (0 when none) (rows)"
    )
    assert visits in firsts
    assert "Type 2 diabetes" in firsts  # the incidence table's row
