"""The report's codes section: the audit of ``ascertain codes``, suppressed by its own rule.

Uses the hand-made code audit fixture (``tests/fixtures/codes_audit``, small-cell threshold 2;
its counts are worked out in its README), built, audited into the build folder and reported.
"""

from __future__ import annotations

import csv
from pathlib import Path

from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.outputs.report import write_report
from pipeline.workflows._codes_files import release
from pipeline.workflows.codes import audit_codes

from .conftest import ROOT

STUDY = ROOT / "tests" / "fixtures" / "codes_audit" / "study.yaml"


def _build(out: Path, *codes_options: str) -> Path:
    assert CliRunner().invoke(app, ["build", str(STUDY), "--out", str(out)]).exit_code == 0
    if codes_options != ("none",):
        args = ["codes", str(STUDY), "--out", str(out), *codes_options]
        result = CliRunner().invoke(app, args)
        assert result.exit_code == 0, result.output
    write_report(out, STUDY)
    return out


def _summary(out: Path, name: str) -> list[dict[str, str]]:
    with (out / "summary" / f"{name}.csv").open(encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def test_report_shows_the_audit_released_by_its_own_rule(tmp_path: Path) -> None:
    out = _build(tmp_path / "build")
    released = release(audit_codes(STUDY))
    matched = _summary(out, "codes_matched")
    assert [(r["code_raw"], r["rows"], r["patients"]) for r in matched] == [
        (r["code_raw"], str(r["rows"]), str(r["patients"])) for r in released.matched
    ]
    near = _summary(out, "codes_near_misses")
    assert [(r["code_normalised"], r["rows"], r["patients"]) for r in near] == [
        (r["code_normalised"], str(r["rows"]), str(r["patients"])) for r in released.near_misses
    ]
    shown = [r[c] for r in matched + near for c in ("rows", "patients")]
    # The fixture's counts of 1 (README: E11.65, E119, C10F7, C10E., I50.1 ...) are hidden
    # (threshold 2); heart failure's I50.9, 3 rows of 2 patients, is shown.
    assert "1" not in shown
    assert "<2" in shown
    assert ("I50.9", "3", "2") in [(r["code_raw"], r["rows"], r["patients"]) for r in matched]
    page = (out / "report.html").read_text(encoding="utf-8")
    assert '<section id="codes">' in page
    assert "<h3>heart_failure</h3>" in page
    assert '<a href="#codes">' in page


def test_a_released_audit_is_left_out_with_a_note(tmp_path: Path) -> None:
    # Its own run suppressed it (threshold 2 here); the report cannot suppress a hidden count
    # again with its threshold, so it says why the section is missing.
    out = _build(tmp_path / "build", "--release")
    assert not (out / "summary" / "codes_matched.csv").exists()
    page = (out / "report.html").read_text(encoding="utf-8")
    assert 'id="codes"' not in page
    assert "already suppressed for release" in page


def test_no_audit_no_section(tmp_path: Path) -> None:
    out = _build(tmp_path / "build", "none")
    assert not (out / "summary" / "codes_matched.csv").exists()
    page = (out / "report.html").read_text(encoding="utf-8")
    assert 'id="codes"' not in page
    assert "Codes matched by each definition" not in page
