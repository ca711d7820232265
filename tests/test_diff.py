"""``ascertain diff`` after a one-day change of a definition's window (hand-made extract)."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.workflows.diff import PATIENT_LEVEL, diff_runs

from .conftest import DEMO_STUDY, HANDMADE


def _build(tmp_path: Path, name: str, changes: str = "", extract: Path = HANDMADE) -> Path:
    text = DEMO_STUDY.read_text(encoding="utf-8")
    text = text.replace("extract: ../../synthetic_extract", f"extract: {extract}")
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


def _diff(run_a: Path, run_b: Path) -> tuple[int, list[str]]:
    result = CliRunner().invoke(app, ["diff", str(run_a), str(run_b)])
    return result.exit_code, result.output.splitlines()


def test_follow_up_changes_and_the_study_key_that_caused_them(tmp_path: Path) -> None:
    base = _build(tmp_path, "base")
    study = tmp_path / "no_contact_end.yaml"
    text = (tmp_path / "base.yaml").read_text(encoding="utf-8")
    old = "end_at: [death, end_of_data, lost_contact, horizon]"
    assert old in text
    text = text.replace(old, "end_at: [death, end_of_data, horizon]")
    study.write_text(text.replace("  lost_contact_after_days: 365\n", ""), "utf-8")
    other = tmp_path / "no_contact_end"
    CliRunner().invoke(app, ["build", str(study), "--out", str(other), "--quiet"])
    code, lines = _diff(base, other)
    assert code == 0
    assert lines[0] == PATIENT_LEVEL
    # By hand (fixture README): HM-034 lost contact 2017-07-07 and now runs to its horizon
    # 2019-04-01, which takes in its heart failure onset of 2018-06-01; HM-035's lost contact
    # tied with its horizon on 2019-07-07, so only its end reason changes.
    assert lines[1:5] == [
        "inputs (from the two manifests):",
        '  study key followup.end_at: ["death", "end_of_data", "lost_contact", "horizon"] -> '
        '["death", "end_of_data", "horizon"]',
        "  study key followup.lost_contact_after_days: 365 -> (not set)",
        "  study file base.yaml -> no_contact_end.yaml: changed",
    ]
    at = lines.index("outcome heart_failure (patients in both cohorts):")
    assert lines[at + 1] == "  became incident: 1 (HM-034)"
    at = lines.index("follow-up and covariates (patients in both cohorts):")
    assert lines[at + 1 :] == [
        "  followup_end changed: 1 (HM-034)",
        "  end_reason changed: 2 (HM-034, HM-035)",
        "  end_reason lost_contact -> horizon: 2 (HM-034, HM-035)",
    ]


def test_a_covariate_window_changes_every_patient(tmp_path: Path) -> None:
    base = _build(tmp_path, "base")
    study = tmp_path / "with_index_day.yaml"
    text = (tmp_path / "base.yaml").read_text(encoding="utf-8")
    old = "visits_prior_year: {count: {encounter: {}}, window: [-365, -1]}"
    assert old in text
    study.write_text(text.replace(old, old.replace("-1]", "0]")), "utf-8")
    other = tmp_path / "with_index_day"
    CliRunner().invoke(app, ["build", str(study), "--out", str(other), "--quiet"])
    result = diff_runs(base, other)
    key = next(c for c in result.inputs if c.what == "study key")
    assert (key.name, key.a, key.b) == (
        "covariates.visits_prior_year.window",
        [-365, -1],
        [-365, 0],
    )
    # The index is each patient's first encounter in the window, so counting the index day
    # adds one encounter for all 29 cohort members (expected_cohort.csv), sorted by id.
    changed = {c.what: (c.count, c.sample) for c in result.values if c.count}
    first = ["HM-001", "HM-002", "HM-004", "HM-006", "HM-008"]
    assert changed == {"visits_prior_year changed": (29, first)}
    assert result.columns_only == {"a": [], "b": []}
    assert not result.identical


def test_a_changed_extract_file_and_nothing_else(tmp_path: Path) -> None:
    extract = tmp_path / "extract"
    shutil.copytree(HANDMADE, extract)
    with (extract / "diagnoses.csv").open("a", encoding="utf-8") as rows:
        rows.write("HM-999,2016-01-01,ICD10,E11.9,visit\n")  # the orphan: set aside, no patient
    base = _build(tmp_path, "base", extract=extract)
    (extract / "diagnoses.csv").write_bytes((HANDMADE / "diagnoses.csv").read_bytes())
    again = _build(tmp_path, "again", extract=extract)
    code, lines = _diff(base, again)
    assert code == 0
    assert lines[:4] == [
        PATIENT_LEVEL,
        "inputs (from the two manifests):",
        "  extract file diagnoses.csv: changed",  # the two study files are alike: no line
        "attrition (remaining after each step):",
    ]
    assert lines[-2:] == ["follow-up and covariates (patients in both cohorts):", "  same"]
    assert "cohort:\n  same" in "\n".join(lines)


def _manifest(folder: Path, **groups: object) -> Path:
    folder.mkdir()
    study = [{"path": "study.yaml", "bytes": 1, "sha256": "s"}]
    data = {"manifest_version": 2, "outputs": {}, "study": study, **groups}
    (folder / "manifest.json").write_text(json.dumps(data), encoding="utf-8")
    return folder


def test_definition_and_extract_files_added_removed_and_changed(tmp_path: Path) -> None:
    from pipeline.workflows.diff import _input_changes  # the manifests alone, without cohorts

    def entries(**files: str) -> list[dict[str, object]]:
        return [{"path": p.replace("__", "."), "bytes": 1, "sha256": h} for p, h in files.items()]

    a = _manifest(
        tmp_path / "a",
        study_keys={"outcomes.horizon_days": 1461, "followup.contact": "encounters"},
        definitions=entries(ckd__yaml="1", copd__yaml="2"),
        extract=entries(diagnoses__csv="3", patients__csv="4"),
    )
    b = _manifest(
        tmp_path / "b",
        study_keys={"outcomes.horizon_years": 4, "followup.contact": "encounters"},
        definitions=entries(ckd__yaml="9", asthma__yaml="5"),
        extract=entries(diagnoses__parquet="3", patients__csv="4"),
    )
    changes, notes = _input_changes(a, b)
    assert [(c.what, c.name, c.state) for c in changes] == [
        ("study key", "outcomes.horizon_days", "removed"),
        ("study key", "outcomes.horizon_years", "added"),
        ("definition file", "asthma.yaml", "added"),
        ("definition file", "ckd.yaml", "changed"),
        ("definition file", "copd.yaml", "removed"),
        ("extract file", "diagnoses.csv", "removed"),
        ("extract file", "diagnoses.parquet", "added"),
    ]
    assert notes == []
    old = _manifest(tmp_path / "old")  # written before manifests recorded the study's keys
    changes, notes = _input_changes(old, b)
    assert [c.what for c in changes] == ["definition file"] * 2 + ["extract file"] * 2
    assert notes == [
        f"study keys not compared: the manifest of {old} does not record them (built by an "
        "earlier version of ascertain); the study files are compared by hash only"
    ]
