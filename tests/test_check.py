"""``ascertain check``: problems with file:line, exit codes 0 / 1 / 2, and --explain."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app

from .conftest import ROOT


def _check(*args: str) -> tuple[int, str]:
    result = CliRunner().invoke(app, ["check", *args])
    return result.exit_code, result.output


@pytest.fixture
def definitions(tmp_path: Path) -> Path:
    folder = tmp_path / "definitions"
    shutil.copytree(ROOT / "definitions", folder)
    return folder


def _edit(path: Path, old: str, new: str) -> None:
    text = path.read_text(encoding="utf-8")
    assert old in text
    path.write_text(text.replace(old, new), encoding="utf-8")


def test_shipped_definitions_are_clean() -> None:
    code, output = _check(str(ROOT / "definitions"))
    assert code == 0, output
    assert output.strip().endswith(", 0 problems")


@pytest.mark.parametrize(
    ("old", "new", "expected"),
    [
        (
            "ICD10: [E11]",
            "ICD10: [E14-E10]",
            "[bad-value] evidence.dm_code.diagnosis.ICD10[0]: "
            "range 'E14-E10' is reversed: E14 comes after E10",
        ),
        (
            "ICD10: [E11]",
            "ICD10: [E11-]",
            "[bad-value] evidence.dm_code.diagnosis.ICD10[0]: "
            "'E11-' is not a valid ICD-10 code or prefix",
        ),
        (
            "at_least: 6.5 %",
            "at_least: 6.5 mg/dL",
            "[bad-value] evidence.a1c_high.measurement.at_least: "
            "unit 'mg/dL' cannot be converted for hba1c",
        ),
    ],
)
def test_broken_definition_exits_1_with_location(
    definitions: Path, old: str, new: str, expected: str
) -> None:
    file = definitions / "conditions" / "type2_diabetes.yaml"
    _edit(file, old, new)
    code, output = _check(str(definitions))
    assert code == 1
    line = next(i for i, text in enumerate(file.read_text().splitlines(), 1) if new in text)
    (reported,) = [row for row in output.splitlines() if row.startswith(f"{file}:{line}:")]
    assert expected in reported


def test_unused_evidence_and_useless_exclusion(definitions: Path) -> None:
    file = definitions / "conditions" / "heart_failure.yaml"
    _edit(
        file,
        '             "404.91", "404.93"]\n',
        '             "404.91", "404.93"]\n      exclude: {ICD10: [J45]}\n  spare:\n'
        "    prescription: {atc: [C03CA01]}\n",
    )
    code, output = _check(str(file))
    assert code == 1
    lines = file.read_text().splitlines()
    spare = next(i for i, t in enumerate(lines, 1) if t.startswith("  spare:"))
    exclude = next(i for i, t in enumerate(lines, 1) if "exclude:" in t)
    assert (
        f"{file}:{spare}:3 [unused-evidence] evidence 'spare' is defined but no rule uses it"
        in (output)
    )
    assert (
        f"{file}:{exclude}:7 [exclude-unused] evidence 'hf_code': excluded ICD10 'J45' is not "
        "inside any included code, so it removes nothing"
    ) in output


def test_unreadable_file_exits_2(tmp_path: Path) -> None:
    bad = tmp_path / "bad.yaml"
    bad.write_text("condition: [unclosed\n", encoding="utf-8")
    code, output = _check(str(bad))
    assert code == 2
    assert f"{bad}:2:1 [bad-yaml] not valid YAML" in output


def test_missing_path_exits_2(tmp_path: Path) -> None:
    code, output = _check(str(tmp_path / "nowhere"))
    assert code == 2
    assert "[not-found] no such file or folder" in output


def test_explain_prints_a_paragraph() -> None:
    code, output = _check(
        "--explain", str(ROOT / "definitions" / "conditions" / "heart_failure.yaml")
    )
    assert code == 0
    assert (
        "Heart failure (heart_failure): a patient is a case from the earliest date on which any "
        "rule is met: rule 'two heart failure codes': 2 hf_code events on distinct days within "
        "730 days of each other; rule 'code and loop diuretic': 1 hf_code and 1 loop_diuretic "
        "events within 365 days of each other. Evidence: hf_code is a diagnosis with an ICD-10 "
        "code starting I50 or I11.0 or I13.0 or I13.2 or an ICD-9 code starting 428 or 402.01 "
        "or 402.11 or 402.91 or 404.01 or 404.03 or 404.11 or 404.13 or 404.91 or 404.93; "
        "loop_diuretic is a prescription with an ATC code starting C03C. Onset: the date the "
        "first rule is met."
    ) in " ".join(output.split())


def test_explain_states_the_absent_window() -> None:
    code, output = _check(
        "--explain", str(ROOT / "definitions" / "conditions" / "type1_diabetes.yaml")
    )
    assert code == 0
    assert (
        "rule 'diabetes code and insulin only': 1 any_dm_code and 1 insulin events within 365 "
        "days of each other, with no non_insulin_drug from the start of the record to 365 days "
        "after the day it is met."
    ) in " ".join(output.split())


def test_missing_provenance_is_reported_at_the_condition_key(definitions: Path) -> None:
    file = definitions / "conditions" / "asthma.yaml"
    text = file.read_text(encoding="utf-8")
    start = text.index("provenance:")
    end = text.index("evidence:")
    file.write_text(text[:start] + text[end:], encoding="utf-8")
    code, output = _check(str(file))
    assert code == 1
    assert (
        f"{file}:1:1 [no-provenance] definition 'asthma' has no provenance: say which published "
        "algorithm it adapts (or that it is our own), its ICD edition, version and date"
    ) in " ".join(output.split())


@pytest.mark.parametrize(
    ("old", "new", "expected"),
    [
        ('version: "1.0"', "version: v1", "provenance.version: String should match pattern"),
        ("date: 2026-12-05", "date: soon", "provenance.date: Input should be a valid date"),
        ('  version: "1.0"\n', "", "[missing-key] 'version' is required in provenance"),
    ],
)
def test_bad_provenance_is_located(definitions: Path, old: str, new: str, expected: str) -> None:
    file = definitions / "conditions" / "asthma.yaml"
    _edit(file, old, new)
    code, output = _check(str(file))
    assert code == 1
    assert f"{file}:" in output
    assert expected in " ".join(output.split())
