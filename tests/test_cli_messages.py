"""What a new analyst sees: messages, exit codes and help texts, each asserted word for word."""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app

from .conftest import DEMO_STUDY, HANDMADE, ROOT
from .helpers import demo_study_variant

RUNNER = CliRunner()


def _explain(patient: str, *extra: str) -> tuple[int, str]:
    args = ["explain", str(DEMO_STUDY), "--patient", patient, "--extract", str(HANDMADE)]
    result = RUNNER.invoke(app, [*args, *extra])
    return result.exit_code, result.output


def test_build_errors_keep_their_code(tmp_path: Path) -> None:
    study = demo_study_variant(tmp_path / "s")
    text = study.read_text(encoding="utf-8").replace("horizon_days:", "horizon_dayz:")
    study.write_text(text, encoding="utf-8")
    result = RUNNER.invoke(app, ["build", str(study), "--out", str(tmp_path / "out")])
    assert result.exit_code == 2
    assert "[unknown-key] unknown key 'horizon_dayz'; did you mean 'horizon_days'?" in (
        result.output
    )
    assert not (tmp_path / "out").exists()


# The shipped definition's codes written inline, as a definition without code lists has them.
_INLINE = {
    "      lists: [../codelists/heart_failure_icd10.csv, ../codelists/heart_failure_icd9.csv]\n": (
        "      ICD10: [I50, I11.0, I13.0, I13.2]\n"
        '      ICD9: ["428", "402.01", "402.11", "402.91", "404.01", "404.03", "404.11",\n'
        '             "404.13", "404.91", "404.93"]\n'
    ),
    "      lists: [../codelists/loop_diuretics_atc.csv]\n": "      atc: [C03C]\n",
}


def _definition(tmp_path: Path, old: str, new: str) -> Path:
    folder = tmp_path / "conditions"
    folder.mkdir()
    source = (ROOT / "definitions" / "conditions" / "heart_failure.yaml").read_text("utf-8")
    for listed, inline in _INLINE.items():
        assert listed in source
        source = source.replace(listed, inline)
    assert old in source
    file = folder / "heart_failure.yaml"
    file.write_text(source.replace(old, new), encoding="utf-8")
    return file


def test_a_single_atc_code_is_a_list_of_one(tmp_path: Path) -> None:
    file = _definition(tmp_path, "atc: [C03C]", "atc: C03C")
    result = RUNNER.invoke(app, ["check", str(file), "--explain"])
    assert result.exit_code == 0, result.output
    assert "a prescription with an ATC code starting C03C" in result.output


def test_an_unquoted_code_is_refused_with_a_hint(tmp_path: Path) -> None:
    file = _definition(tmp_path, 'ICD9: ["428",', "ICD9: [428,")
    result = RUNNER.invoke(app, ["check", str(file)])
    assert result.exit_code == 1
    assert (
        "[bad-value] evidence.hf_code.diagnosis.ICD9[0]: the code 428 was read as a number; "
        'put codes in quotes, e.g. ["428"], so they are read exactly as written'
    ) in result.output


def test_explain_an_unknown_patient() -> None:
    code, output = _explain("NOPE")
    assert code == 1
    assert output.strip() == "no patient NOPE in the extract"


def test_explain_says_why_there_is_no_index_date() -> None:
    # HM-003: encounters on 2013-05-05, 2014-12-31 and 2017-01-01, none in the window
    # (fixture README).
    code, output = _explain("HM-003")
    assert code == 0
    assert (
        "no index date, not in the source population: no usable encounter from 2015-01-01 to "
        "2016-12-31 (the index window), before death; its usable encounters run from "
        "2013-05-05 to 2017-01-01"
    ) in output


def test_explain_an_orphan_patient() -> None:
    # HM-999 has rows in encounters and diagnoses but none in patients (fixture README).
    code, output = _explain("HM-999")
    assert code == 0
    assert (
        "not in the source population: not in the patients table: its rows (diagnoses: 2, "
        "encounters: 2, prescriptions: 1) are orphans, set aside in the quality log"
    ) in output


def test_explain_json_schema() -> None:
    code, output = _explain("HM-005", "--format", "json")
    assert code == 0
    trace = json.loads(output)
    assert trace["trace_version"] == 2
    assert all(set(step) == {"step", "description", "passed"} for step in trace["eligibility"])
    assert [s["step"] for s in trace["eligibility"]][:3] == ["sex", "alive_at_index", "age"]
    assert trace["values"]["age_at_index"] == 39
    assert trace["not_in_source_population"] is None
    assert trace["rows_in_extract"]["patients"] == 1


def test_explain_rounds_numbers_as_the_outputs() -> None:
    # HX-024's derived eGFR (CKD-EPI 2021) has many decimals; the trace keeps 6, as the outputs.
    args = ["explain", str(DEMO_STUDY), "--patient", "HX-024", "--format", "json"]
    extract = HANDMADE.parent / "handmade_measures"
    trace = json.loads(RUNNER.invoke(app, [*args, "--extract", str(extract)]).output)
    values = [m["value"] for m in trace["outcomes"]["ckd"]["measurements"] if m["value"]]
    assert values
    assert all(round(v, 6) == v for v in values)
    assert any(round(v, 2) != v for v in values)


def test_attrition_starts_from_the_whole_extract() -> None:
    with (HANDMADE / "expected_attrition.csv").open(encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    # Written by hand: 40 patients, HM-003 and HM-019 without an index date (fixture README).
    assert rows[0] == {
        "step": "patients_in_extract",
        "patients_before": "40",
        "removed": "0",
        "remaining": "40",
    }
    assert rows[1]["step"] == "without_index_date"
    assert (rows[1]["removed"], rows[1]["remaining"]) == ("2", "38")


def test_build_help_lists_every_output() -> None:
    result = RUNNER.invoke(app, ["build", "--help"], env={"COLUMNS": "200"})
    assert result.exit_code == 0
    files = (
        "cohort.parquet, population.parquet, attrition.csv, quality.csv, dictionary.csv, "
        "dictionary.md, manifest.json and run.json"
    )
    assert files in result.output


@pytest.mark.parametrize(
    "command",
    [
        "build",
        "check",
        "sql",
        "explain",
        "verify",
        "diff",
        "validate",
        "report",
        "profile",
        "synth",
    ],
)
def test_every_command_help_has_outputs_and_an_example(command: str) -> None:
    result = RUNNER.invoke(app, [command, "--help"], env={"COLUMNS": "200"})
    assert result.exit_code == 0
    assert re.search(r"\bWrites\b", result.output), result.output
    assert f"Example: ascertain {command} " in result.output
