"""``ascertain check``: problems with file:line, exit codes 0 / 1 / 2, and --explain."""

from __future__ import annotations

import shutil
from collections.abc import Callable
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app

from .conftest import ROOT
from .helpers import demo_study_variant


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


_T2_LISTS = "lists: [../codelists/type2_diabetes_icd10.csv, ../codelists/type2_diabetes_icd9.csv]"


@pytest.mark.parametrize(
    ("old", "new", "expected"),
    [
        (
            _T2_LISTS,
            "ICD10: [E14-E10]",
            "[bad-value] evidence.dm_code.diagnosis.ICD10[0]: "
            "range 'E14-E10' is reversed: E14 comes after E10",
        ),
        (
            _T2_LISTS,
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
        "heart_failure_icd9.csv]\n",
        "heart_failure_icd9.csv]\n      exclude: {ICD10: [J45]}\n  spare:\n"
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
        "code starting I50 or I11.0 or I13.0 or I13.2 (list heart_failure_icd10, edition WHO) "
        "or an ICD-9 code starting 428 or 402.01 or 402.11 or 402.91 or 404.01 or 404.03 or "
        "404.11 or 404.13 or 404.91 or 404.93 (list heart_failure_icd9, edition ICD-9-CM); "
        "loop_diuretic is a prescription with a WHO ATC code starting C03C (list "
        "loop_diuretics_atc, edition WHO ATC). Onset: the date the first rule is met."
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


DEMO_EXPLAINED = (
    "Incident type 2 diabetes, CKD and heart failure in the Orvane Bay network, 2015-2019 "
    "(orvane_multimorbidity): Index: the first encounter between 2015-01-01 and 2016-12-31. "
    "Eligibility, in this order: 1. sex recorded as F or M; 2. alive at index (no death on or "
    "before the index date); 3. age at index between 40 and 85 years; 4. first encounter at "
    "least 730 days before index; 5. at risk of at least one outcome (not prevalent for all of "
    "type2_diabetes, ckd, heart_failure). Outcomes, side by side: type2_diabetes, ckd and "
    "heart_failure; each is prevalent when its onset is on or before the index date, and "
    "incident when its onset falls after the index date and within the horizon of 1461 days "
    "after index. Follow-up ends at the first of death, the end of data (2019-12-31), loss of "
    "contact (365 days after the last encounter) or the horizon (ties in that order); a patient "
    "whose follow-up ends before the horizon is censored. Covariates: bmi is the latest value "
    "of bmi from 730 days before index to the index date; sbp is the latest value of sbp from "
    "730 days before index to the index date; hba1c is the latest value of hba1c from 730 days "
    "before index to the index date; egfr is the latest value of egfr from 730 days before "
    "index to the index date; visits_prior_year is the number of records of an encounter of "
    "any type from 365 days before index to 1 day before index; hypertension is whether "
    "hypertension has its onset on or before the index date; charlson is the Charlson index "
    "from the start of the record to the index date, from the Quan 2005 ICD10 codes with the "
    "Charlson 1987 weights."
)


def test_explain_a_study_in_plain_sentences() -> None:
    code, out = _check(
        "--explain", str(ROOT / "definitions" / "studies" / "orvane_multimorbidity.yaml")
    )
    assert code == 0, out
    assert out == f"{DEMO_EXPLAINED}\n\n1 files checked, 0 problems\n"


def test_explain_a_study_states_every_other_choice(study_copy: Callable[[str], Path]) -> None:
    study = study_copy(
        """\
study: other_choices
title: Other choices
extract: extract
definitions: ../conditions
end_of_data: 2019-12-31
index: {first_event: {between: [2015-01-01, 2016-12-31], evidence: {prescription: {atc: [A10B]}}}}
eligibility:
  - registered_days: 365
  - encounters: {at_least: 2, window: [-730, -1]}
  - practice: [P2, P1]
  - not_prevalent: ckd
  - no_evidence: {evidence: {diagnosis: {ICD10: [E10]}}, window: [null, 0]}
  - in_contact_at_index: {window: [-365, 0]}
covariates:
  years_ckd: {days_since_first_evidence: ckd}
  low_egfr: {minimum: egfr, window: [-365, 0]}
  c: {charlson: {weights: quan_2011, codes: [ICD10, ICD9]}}
outcomes: {conditions: [heart_failure], horizon_years: 3, lookback: 1825,
           clear_before: {heart_failure: 365}}
followup: {end_at: [death, deregistration, horizon], incomplete: exclude}
output: {folder: out}
"""
    )
    code, out = _check("--explain", str(study))
    assert code == 0, out
    for sentence in (
        "Index: the first date of a prescription with an ATC code starting A10B between "
        "2015-01-01 and 2016-12-31.",
        "1. registered at least 365 days before index; 2. at least 2 encounters from 730 days "
        "before index to 1 day before index; 3. registered at practice P1 or P2; 4. no ckd on "
        "or before the index date; 5. without a diagnosis with an ICD-10 code starting E10 "
        "from the start of the record to the index date; 6. a contact from 365 days before "
        "index to the index date, and not deregistered before index.",
        "within the horizon of 3 years after index. For heart_failure only evidence from 1825 "
        "days before index on counts. A patient with any evidence a rule of heart_failure needs "
        "from 365 days before index to the index date is not at risk of heart_failure.",
        "Follow-up ends at the first of death, deregistration or the horizon (ties in that "
        "order); a patient whose follow-up ends before the horizon is removed (one more "
        "attrition step), unless it ended at death.",
        "Covariates: years_ckd is the days from the first evidence of ckd to the index date; "
        "low_egfr is the lowest value of egfr from 365 days before index to the index date; c "
        "is the Charlson index from the start of the record to the index date, from the Quan "
        "2005 ICD10 and ICD9 codes with the Quan 2011 weights.",
    ):
        assert sentence in out, sentence


def test_explain_a_study_says_what_person_time_it_writes(tmp_path: Path) -> None:
    option = "{age_bands: [40, 60, 80], calendar_year: false, since_index_years: [0, 1, 3]}"
    code, out = _check("--explain", str(demo_study_variant(tmp_path, persontime=option)))
    assert code == 0, out
    assert out.startswith(DEMO_EXPLAINED)  # the rest of the paragraph is unchanged
    assert out.removeprefix(DEMO_EXPLAINED).startswith(
        " Person-time: each patient's follow-up is split by age band (40-59, 60-79 and 80+) "
        "and whole years since index (0-1, 1-3 and 3+) into persontime.parquet, with each "
        "outcome's days at risk and events; the report's rates by age band come from it.\n"
    )
