"""The report and the profile page as a browser lays them out: nothing wider than the page.

Each page is copied with a small script added at its end that measures every element with the
page's own layout (``getBoundingClientRect`` against the viewport's width) and writes the ones
reaching past the page's edge into the DOM; headless Chromium prints that DOM
(``--dump-dom``). An element inside a box that scrolls or clips sideways is not counted when
that box itself fits. The same pages are screenshotted into ``test-artifacts/`` to look at.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from pipeline.outputs.report import write_report
from pipeline.workflows.build import BuildOptions, build_study
from pipeline.workflows.profile import _bars, profile_extract, write_profile

from .conftest import DEMO_STUDY, ROOT

WIDTH = 1000  # a laptop browser window, in CSS pixels

MEASURE = """<script>
(function () {
  var limit = document.documentElement.clientWidth;
  function contained(e) {
    for (var a = e.parentElement; a; a = a.parentElement) {
      var style = getComputedStyle(a);
      if (style.overflowX !== "visible" && a.getBoundingClientRect().right <= limit + 0.5) {
        return true;
      }
    }
    return false;
  }
  var over = [];
  document.querySelectorAll("body *").forEach(function (e) {
    var r = e.getBoundingClientRect();
    if (r.width > 0 && (r.right > limit + 0.5 || r.left < -0.5) && !contained(e)) {
      var name = e.tagName.toLowerCase() + (e.id ? "#" + e.id : "");
      over.push(name + " " + Math.round(r.left) + ".." + Math.round(r.right));
    }
  });
  var out = document.createElement("pre");
  out.id = "overflow-report";
  out.textContent = JSON.stringify({width: limit, over: over});
  document.body.appendChild(out);
})();
</script>"""


def _chromium() -> str:
    browser = "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None
    browser = browser or shutil.which("chromium")
    if browser is None:
        pytest.skip("no chromium: install the Debian package (apt-get install -y chromium)")
    return browser


def _run(page: Path, tmp_path: Path, *mode: str) -> str:
    command = [
        _chromium(),
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--hide-scrollbars",
        f"--user-data-dir={tmp_path / 'browser'}",
        f"--window-size={WIDTH},2000",
        *mode,
        page.as_uri(),
    ]
    done = subprocess.run(command, check=True, timeout=120, capture_output=True, text=True)
    return done.stdout


def overflowing(page: Path, tmp_path: Path) -> list[str]:
    """The elements of ``page`` reaching past the edge of a ``WIDTH``-pixel window."""
    html = page.read_text(encoding="utf-8")
    assert "</body>" in html
    probe = tmp_path / f"measured-{page.name}"
    probe.write_text(html.replace("</body>", MEASURE + "</body>", 1), encoding="utf-8")
    dom = _run(probe, tmp_path, "--dump-dom")
    found = re.search(r'<pre id="overflow-report">(.*?)</pre>', dom, re.DOTALL)
    assert found, "the measuring script did not run"
    report = json.loads(found.group(1).replace("&quot;", '"').replace("&amp;", "&"))
    assert report["width"] > WIDTH - 50  # the window size was applied
    return list(report["over"])


def _screenshot(page: Path, tmp_path: Path, name: str) -> None:
    artifacts = ROOT / "test-artifacts"
    artifacts.mkdir(exist_ok=True)
    png = artifacts / name
    png.unlink(missing_ok=True)
    _run(page, tmp_path, f"--screenshot={png}")
    assert png.stat().st_size > 10_000


@pytest.fixture(scope="module")
def demo_pages(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("pages")
    build_study(DEMO_STUDY, BuildOptions(out=root / "out"))
    write_report(root / "out", DEMO_STUDY)
    profile = profile_extract(ROOT / "synthetic_extract")
    write_profile(profile, root / "profile")
    return {"report": root / "out" / "report.html", "profile": root / "profile" / "profile.html"}


@pytest.mark.parametrize("which", ["report", "profile"])
def test_no_element_is_wider_than_the_page(
    which: str, demo_pages: dict[str, Path], tmp_path: Path
) -> None:
    assert overflowing(demo_pages[which], tmp_path) == []
    _screenshot(demo_pages[which], tmp_path, f"{which}-{WIDTH}px.png")


def test_a_too_wide_element_is_found(tmp_path: Path) -> None:
    page = tmp_path / "wide.html"
    page.write_text(
        "<!doctype html><html><body><p>fits</p>"
        '<div id="scrolls" style="overflow-x:auto"><table id="inside" style="width:3000px">'
        "<tr><td>wide but scrolls in its box</td></tr></table></div>"
        '<svg id="chart" width="2400" height="20"></svg></body></html>',
        encoding="utf-8",
    )
    found = overflowing(page, tmp_path)
    assert [f.split()[0] for f in found] == ["svg#chart"]


def test_report_definitions_show_the_rules_in_check_wording(demo_pages: dict[str, Path]) -> None:
    html = demo_pages["report"].read_text(encoding="utf-8")
    section = html[html.index('id="definitions"') : html.index('id="quality"')]
    assert (
        '<p class="about">A patient is a case from the earliest date on which any rule is met: '
        "rule &#x27;two heart failure codes&#x27;: 2 hf_code events on distinct days within 730 "
        "days of each other; rule &#x27;code and loop diuretic&#x27;: 1 hf_code and 1 "
        "loop_diuretic events within 365 days of each other. Evidence: hf_code is a diagnosis "
        "with an ICD-10 code starting I50 or I11.0 or I13.0 or I13.2"
    ) in section
    # one per definition the study uses: three outcomes and the hypertension covariate
    assert section.count("A patient is a case from the earliest date") == 4


def test_birth_years_fit_the_page_and_are_shown_in_full() -> None:
    years = {str(y): 10 + y % 7 for y in range(1911, 2022) if y != 1950}
    svg = _bars(years)
    # scaled to the page: a view box, the page's width, never a fixed width in pixels
    assert re.search(r'<svg viewBox="[-\d. ]+" width="100%"', svg)
    labels = re.findall(r"<text[^>]*>([^<]*)</text>", svg)
    assert labels == [str(y) for y in range(1915, 2021, 5)]  # full years, never crowded
    assert svg.count("<rect") == 2021 - 1911 + 1  # a missing year keeps its place on the axis
    assert "<title>1950: 0</title>" in svg
    few = _bars({"2019": 3, "2020": 4})
    assert re.findall(r"<text[^>]*>([^<]*)</text>", few) == ["2019", "2020"]
