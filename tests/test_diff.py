"""``ascertain diff`` after a one-day change of a definition's window (hand-made extract)."""

from __future__ import annotations

from pathlib import Path

from typer.testing import CliRunner

from pipeline._diff import diff_runs
from pipeline.cli import app

from .conftest import DEMO_STUDY, HANDMADE


def _build(tmp_path: Path, name: str, changes: str = "") -> Path:
    text = DEMO_STUDY.read_text(encoding="utf-8")
    text = text.replace("extract: ../../synthetic_extract", f"extract: {HANDMADE}")
    text = text.replace(
        "definitions: ../conditions", f"definitions: {DEMO_STUDY.parent.parent}/conditions"
    )
    text += changes
    study = tmp_path / f"{name}.yaml"
    study.write_text(text, encoding="utf-8")
    out = tmp_path / name
    result = CliRunner().invoke(app, ["build", str(study), "--out", str(out), "--quiet"])
    assert result.exit_code == 0, result.output
    return out


def _counts(changes: list) -> dict[str, tuple[int, list[str]]]:
    return {c.what: (c.count, c.sample) for c in changes if c.count}


def test_widening_the_two_code_window_by_one_day(tmp_path: Path) -> None:
    base = _build(tmp_path, "base")
    wider = _build(
        tmp_path,
        "wider",
        "definition_changes:\n  type2_diabetes:\n    two diabetes codes: {within_days: 731}\n",
    )
    result = diff_runs(base, wider)
    # HM-025: two diabetes codes 731 days apart, second on 2018-01-10 inside follow-up
    # (fixture README): the rule is now met and the patient becomes incident.
    assert _counts(result.outcomes["type2_diabetes"]) == {
        "rule newly met": (1, ["HM-025"]),
        "became incident": (1, ["HM-025"]),
    }
    assert _counts(result.outcomes["heart_failure"]) == {}
    assert result.cohort == []
    assert all(row["change"] == 0 for row in result.attrition)
    assert not result.identical


def test_narrowing_by_one_day_and_the_command(tmp_path: Path) -> None:
    base = _build(tmp_path, "base")
    narrower = _build(
        tmp_path,
        "narrower",
        "definition_changes:\n  type2_diabetes:\n    two diabetes codes: {within_days: 729}\n",
    )
    # HM-024: codes exactly 730 days apart -> no longer met with 729
    assert _counts(diff_runs(base, narrower).outcomes["type2_diabetes"]) == {
        "rule no longer met": (1, ["HM-024"]),
        "no longer incident": (1, ["HM-024"]),
    }
    output = CliRunner().invoke(app, ["diff", str(base), str(narrower)]).output
    assert "rule no longer met: 1 (HM-024)" in output
    assert diff_runs(base, base).identical


def test_a_patient_leaving_the_cohort_is_explained(tmp_path: Path) -> None:
    base = _build(tmp_path, "base")
    older = _build(tmp_path, "older")
    study = tmp_path / "older.yaml"
    study.write_text(study.read_text().replace("between: [40, 85]", "between: [41, 85]"))
    CliRunner().invoke(app, ["build", str(study), "--out", str(older), "--quiet"])
    result = diff_runs(base, older)
    # HM-004 and HM-009 are exactly 40 at index (fixture README); nobody else changes.
    assert [(c.what, c.count, c.sample) for c in result.cohort] == [
        ("left the cohort (excluded now at: age)", 2, ["HM-004", "HM-009"])
    ]
    age = next(row for row in result.attrition if row["step"] == "age")
    assert age["change"] == -2
