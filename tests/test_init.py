"""``ascertain init``: a new study folder that checks clean, builds, and never replaces a file."""

from __future__ import annotations

import csv
from pathlib import Path

from typer.testing import CliRunner

from pipeline.cli import app

from .conftest import ROOT

RUNNER = CliRunner()
WRITTEN = [
    "README.md",
    "ascertain-init.json",
    # the copied definition's code lists, beside definitions/ as in the library
    "codelists/non_insulin_glucose_lowering_atc.csv",
    "codelists/non_insulin_glucose_lowering_atc.list.yaml",
    "codelists/type2_diabetes_icd10.csv",
    "codelists/type2_diabetes_icd10.list.yaml",
    "codelists/type2_diabetes_icd9.csv",
    "codelists/type2_diabetes_icd9.list.yaml",
    "definitions/gout.yaml",
    "definitions/type2_diabetes.yaml",
    "study.yaml",
]


def _files(folder: Path) -> dict[str, bytes]:
    return {
        p.relative_to(folder).as_posix(): p.read_bytes()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def test_init_writes_a_study_that_checks_and_builds(tmp_path: Path) -> None:
    folder = tmp_path / "my_first"
    result = RUNNER.invoke(app, ["init", str(folder), "--extract", str(ROOT / "synthetic_extract")])
    assert result.exit_code == 0, result.output
    assert sorted(_files(folder)) == WRITTEN
    library = ROOT / "definitions" / "conditions" / "type2_diabetes.yaml"
    assert (folder / "definitions" / "type2_diabetes.yaml").read_bytes() == library.read_bytes()
    study = (folder / "study.yaml").read_text(encoding="utf-8")
    assert "\nstudy: my_first\n" in study
    # The extract is written relative to the study, so the folder can move with its extract.
    assert not any(line.startswith("extract: /") for line in study.splitlines())

    checked = RUNNER.invoke(app, ["check", str(folder), "--explain"])
    assert checked.exit_code == 0, checked.output
    assert checked.output.endswith("6 files checked, 0 problems\n")
    assert "Gout (skeleton) (gout): a patient is a case" in checked.output

    out = tmp_path / "out"
    built = RUNNER.invoke(app, ["build", str(folder / "study.yaml"), "--out", str(out), "--quiet"])
    assert built.exit_code == 0, built.output
    with (out / "attrition.csv").open(encoding="utf-8") as handle:
        steps = [row["step"] for row in csv.DictReader(handle)]
    assert steps[-1] == "at_risk_any_outcome"
    assert "history" in steps


def test_init_study_offers_person_time_that_checks_clean(tmp_path: Path) -> None:
    RUNNER.invoke(app, ["init", str(tmp_path / "s")])
    study = tmp_path / "s" / "study.yaml"
    text = study.read_text(encoding="utf-8")
    lines = ["persontime:", "  age_bands:", "  calendar_year:", "  since_index_years:"]
    for line in lines:
        assert f"\n# {line}" in text, line
        text = text.replace(f"\n# {line}", f"\n{line}")
    study.write_text(text, encoding="utf-8")
    checked = RUNNER.invoke(app, ["check", str(study), "--explain"])
    assert checked.exit_code == 0, checked.output
    assert "Person-time: each patient's follow-up is split by age band (40-49," in checked.output


def test_init_skeleton_names_every_definition_key(tmp_path: Path) -> None:
    from pipeline.config._condition import Condition, Evidence, Provenance, Rule

    RUNNER.invoke(app, ["init", str(tmp_path / "s")])
    skeleton = (tmp_path / "s" / "definitions" / "gout.yaml").read_text(encoding="utf-8")
    keys = {
        *Condition.model_fields,
        *Provenance.model_fields,
        *Evidence.model_fields,
        *Rule.model_fields,
    }
    missing = sorted(k for k in keys if f"{k}:" not in skeleton)
    assert missing == []


def test_init_refuses_a_folder_that_is_not_empty(tmp_path: Path) -> None:
    folder = tmp_path / "mine"
    folder.mkdir()
    (folder / "notes.txt").write_text("my notes\n", encoding="utf-8")
    before = _files(folder)
    result = RUNNER.invoke(app, ["init", str(folder)])
    assert result.exit_code == 2
    assert result.output == (
        f"error: {folder} is not empty (it holds notes.txt). Nothing was written: `ascertain "
        "init` writes only into a new or empty folder, so it never replaces a study you edited\n"
    )
    assert _files(folder) == before
    assert [p.name for p in tmp_path.iterdir()] == ["mine"]  # no staging folder left behind


def test_init_twice_refuses_and_keeps_the_edited_study(tmp_path: Path) -> None:
    folder = tmp_path / "s"
    assert RUNNER.invoke(app, ["init", str(folder)]).exit_code == 0
    (folder / "study.yaml").write_text("study: edited\n", encoding="utf-8")
    before = _files(folder)
    result = RUNNER.invoke(app, ["init", str(folder)])
    assert result.exit_code == 2
    assert (
        "is not empty (it holds README.md, ascertain-init.json, codelists, definitions"
        in result.output
    )
    assert _files(folder) == before
