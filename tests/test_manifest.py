"""Manifest and verify: a build can be rebuilt bit for bit, and changes are named."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app

from .conftest import DEMO_STUDY, HANDMADE, ROOT


@pytest.fixture
def workspace(tmp_path: Path) -> tuple[Path, Path, Path]:
    """A copy of the definitions and of the hand-made extract, and a built output folder."""
    shutil.copytree(ROOT / "definitions", tmp_path / "definitions")
    extract = tmp_path / "extract"
    shutil.copytree(HANDMADE, extract, ignore=shutil.ignore_patterns("expected_*", "*.md"))
    study = tmp_path / "definitions" / "studies" / DEMO_STUDY.name
    out = tmp_path / "out"
    result = CliRunner().invoke(
        app, ["build", str(study), "--extract", str(extract), "--out", str(out), "--quiet"]
    )
    assert result.exit_code == 0, result.output
    return study, extract, out


def _verify(out: Path) -> tuple[int, str]:
    result = CliRunner().invoke(app, ["verify", str(out)])
    return result.exit_code, result.output


def test_manifest_lists_inputs_outputs_and_versions(workspace: tuple[Path, Path, Path]) -> None:
    study, _, out = workspace
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    assert manifest["manifest_version"] == 2
    assert manifest["study"][0]["path"] == study.name
    assert "../conditions/heart_failure.yaml" in {e["path"] for e in manifest["definitions"]}
    assert manifest["locations"] == {
        "extract_kind": "folder",
        "extract_from_study": "../../extract",
        "study_from_output": f"../definitions/studies/{study.name}",
    }
    assert {e["path"] for e in manifest["extract"]} == {
        "patients.csv",
        "encounters.csv",
        "diagnoses.csv",
        "prescriptions.csv",
        "measurements.csv",
    }
    assert sorted(manifest["outputs"]) == [
        "attrition.csv",
        "cohort.parquet",
        "dictionary.csv",
        "dictionary.md",
        "population.parquet",
        "quality.csv",
    ]
    assert manifest["engine"]["name"] == "duckdb"
    assert len(manifest["plan_hash"]) == 64
    assert "started_utc" not in manifest


def test_verify_right_after_a_build_is_identical(workspace: tuple[Path, Path, Path]) -> None:
    _, _, out = workspace
    code, output = _verify(out)
    assert code == 0, output
    assert "identical" in output


def test_verify_names_a_changed_extract_file(workspace: tuple[Path, Path, Path]) -> None:
    _, extract, out = workspace
    with (extract / "diagnoses.csv").open("a", encoding="utf-8") as handle:
        handle.write("HM-001,2016-05-05,ICD10,I50.9,billing\n")
    code, output = _verify(out)
    assert code == 1
    assert "changed input: extract file diagnoses.csv has changed since the build" in output


def test_verify_names_a_changed_definition(workspace: tuple[Path, Path, Path]) -> None:
    study, _, out = workspace
    hf = study.parent.parent / "conditions" / "heart_failure.yaml"
    hf.write_text(hf.read_text(encoding="utf-8").replace("within_days: 365", "within_days: 30"))
    code, output = _verify(out)
    assert code == 1
    assert (
        "changed input: definitions file ../conditions/heart_failure.yaml has changed since the "
        "build" in output
    )
    assert "differs: the plan" in output


def test_verify_notices_an_edited_output(workspace: tuple[Path, Path, Path]) -> None:
    _, _, out = workspace
    with (out / "attrition.csv").open("a", encoding="utf-8") as handle:
        handle.write("extra,line,0,0,0\n")
    code, output = _verify(out)
    assert code == 1
    assert "differs: attrition.csv (the file in the folder no longer matches" in output


def test_verify_without_manifest_exits_2(tmp_path: Path) -> None:
    code, output = _verify(tmp_path)
    assert code == 2
    assert "cannot read the manifest" in output


def test_two_builds_with_1_and_2_threads_are_byte_identical(
    workspace: tuple[Path, Path, Path], tmp_path: Path
) -> None:
    study, extract, out = workspace
    again = tmp_path / "again"
    result = CliRunner().invoke(
        app,
        [
            "build",
            str(study),
            "--extract",
            str(extract),
            "--out",
            str(again),
            "--threads",
            "1",
            "--quiet",
        ],
    )
    assert result.exit_code == 0, result.output
    for name in ("cohort.parquet", "attrition.csv", "quality.csv", "dictionary.csv"):
        assert (again / name).read_bytes() == (out / name).read_bytes(), name


def test_manifest_hashes_code_lists_and_verify_names_a_changed_one(
    workspace: tuple[Path, Path, Path],
) -> None:
    study, _, out = workspace
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    names = {e["path"] for e in manifest["definitions"]}
    assert {
        "../codelists/heart_failure_icd10.csv",
        "../codelists/heart_failure_icd10.list.yaml",
    } <= names
    # a term edited by a reviewer changes no code and no plan, but the input differs
    listed = study.parent.parent / "codelists" / "heart_failure_icd10.csv"
    listed.write_text(listed.read_text(encoding="utf-8").replace("Heart failure", "HF"))
    code, output = _verify(out)
    assert code == 1
    assert (
        "changed input: definitions file ../codelists/heart_failure_icd10.csv has changed "
        "since the build" in output
    )
