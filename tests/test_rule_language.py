"""The definition language end to end: each construct on a tiny extract, and its errors."""

from __future__ import annotations

from pathlib import Path

import polars as pl
import pytest

from pipeline.codes import check_code
from pipeline.config import load_catalog
from pipeline.errors import ConfigError
from pipeline.workflows.build import BuildOptions, build_study

from .helpers import eligible_encounters, eligible_patient, write_extract, write_study

DIABETES = """\
condition: diabetes
title: Diabetes, any type
about: test definition
evidence:
  code: {diagnosis: {ICD10: [E10-E14]}}
rules:
  - {name: two codes, need: {code: 2}, distinct_days: true, within_days: 730}
"""

TYPE2 = """\
condition: type2
title: Type 2 diabetes
about: test definition - diabetes and never a type 1 code
evidence:
  diabetes: {condition: diabetes}
  t1_code: {diagnosis: {ICD10: [E10]}}
rules:
  - {name: diabetes without type 1, need: {diabetes: 1}, absent: [t1_code]}
"""


def _dx(pid: str, day: str, code: str, source: str = "billing") -> dict:
    return {
        "patient_id": pid,
        "event_date": day,
        "code_system": "ICD10",
        "code": code,
        "source": source,
    }


def _build(
    tmp_path: Path,
    conditions: dict[str, str],
    outcomes: list[str],
    tables: dict,
    covariates: str = "{}",
) -> pl.DataFrame:
    patients = sorted({r["patient_id"] for rows in tables.values() for r in rows})
    tables = {
        "patients": [eligible_patient(p) for p in patients],
        "encounters": [e for p in patients for e in eligible_encounters(p)],
        **tables,
    }
    extract = write_extract(tmp_path / "extract", tables)
    study = write_study(
        tmp_path / "study", conditions, outcomes, extract=extract, covariates=covariates
    )
    build_study(study, BuildOptions(out=tmp_path / "out"))
    return pl.read_parquet(tmp_path / "out" / "cohort.parquet")


def _onsets(cohort: pl.DataFrame, condition: str) -> dict[str, str | None]:
    return {
        row["patient_id"]: row[f"onset_{condition}"] and row[f"onset_{condition}"].isoformat()
        for row in cohort.iter_rows(named=True)
    }


def test_condition_reference_and_absent_evidence(tmp_path: Path) -> None:
    cohort = _build(
        tmp_path,
        {"diabetes": DIABETES, "type2": TYPE2},
        ["diabetes", "type2"],
        {
            "diagnoses": [
                _dx("A", "2016-01-01", "E11.9"),
                _dx("A", "2016-06-01", "E11.9"),
                _dx("B", "2016-01-01", "E11.9"),
                _dx("B", "2016-06-01", "E11.9"),
                _dx("B", "2019-05-01", "E10.9"),  # a type 1 code ever, even later, rules type 2 out
                _dx("C", "2016-01-01", "E10.1"),
                _dx("C", "2016-03-01", "E10.1"),
            ]
        },
    )
    assert _onsets(cohort, "diabetes") == {"A": "2016-06-01", "B": "2016-06-01", "C": "2016-03-01"}
    # type 2 onset is the diabetes onset (a referenced condition is one event on its onset)
    assert _onsets(cohort, "type2") == {"A": "2016-06-01", "B": None, "C": None}


def test_exclusions_sources_encounters_and_first_evidence(tmp_path: Path) -> None:
    definition = """\
condition: chest
title: Chest condition
about: test definition
evidence:
  code:
    diagnosis:
      ICD10: [J40-J44]
      exclude: {ICD10: [J43.9]}
      source: [problem_list]
  home_visit: {encounter: {type: [Home]}}
rules:
  - {name: code and home visit, need: {code: 1, home_visit: 1}, within_days: 30}
onset: first_evidence
"""
    home = {"encounter_type": "home"}
    cohort = _build(
        tmp_path,
        {"chest": definition},
        ["chest"],
        {
            "diagnoses": [
                _dx("A", "2016-01-01", "J44.1", "problem_list"),
                _dx("B", "2016-01-01", "J43.9", "problem_list"),  # excluded code
                _dx("C", "2016-01-01", "J44.1", "billing"),  # wrong source
                _dx("D", "2016-01-01", "J45", "problem_list"),  # outside the range
            ],
            "encounters": [
                *(
                    e | home
                    for p in "ABCD"
                    for e in eligible_encounters(p)
                    if e["encounter_date"] == "2016-03-01"
                ),
                {"patient_id": "A", "encounter_date": "2015-12-20", "encounter_type": "visit"},
                {"patient_id": "A", "encounter_date": "2016-01-20", "encounter_type": "Home"},
                *(e for p in "ABCD" for e in eligible_encounters(p)),
                {"patient_id": "B", "encounter_date": "2016-01-20", "encounter_type": "home"},
                {"patient_id": "C", "encounter_date": "2016-01-20", "encounter_type": "home"},
                {"patient_id": "D", "encounter_date": "2016-01-20", "encounter_type": "home"},
            ],
        },
    )
    # A meets the rule on 2016-01-20; onset is the first evidence, the code on 2016-01-01.
    assert _onsets(cohort, "chest") == {"A": "2016-01-01", "B": None, "C": None, "D": None}


def test_prescription_duration_and_measurement_between(tmp_path: Path) -> None:
    definition = """\
condition: treated_prediabetes
title: Treated prediabetes
about: test definition
evidence:
  metformin: {prescription: {atc: [A10BA02], min_days: 28}}
  a1c_mid: {measurement: {measure: hba1c, between: [5.7 %, 6.4 %]}}
rules:
  - {name: drug and mid HbA1c, need: {metformin: 1, a1c_mid: 1}, within_days: 90}
"""

    def rx(pid: str, start: str, stop: str) -> dict:
        return {"patient_id": pid, "start_date": start, "stop_date": stop, "atc": "A10BA02"}

    def a1c(pid: str, day: str, value: str) -> dict:
        return {"patient_id": pid, "obs_date": day, "measure": "hba1c", "value": value, "unit": "%"}

    cohort = _build(
        tmp_path,
        {"treated_prediabetes": definition},
        ["treated_prediabetes"],
        {
            "prescriptions": [
                rx("A", "2016-01-01", "2016-01-28"),  # 28 days, both ends counted
                rx("B", "2016-01-01", "2016-01-27"),  # 27 days: too short
                rx("C", "2016-01-01", ""),  # no stop date: duration unknown
                rx("D", "2016-01-01", "2016-06-01"),
            ],
            "measurements": [
                a1c("A", "2016-02-01", "6.4"),
                a1c("B", "2016-02-01", "6.0"),
                a1c("C", "2016-02-01", "6.0"),
                a1c("D", "2016-02-01", "6.5"),
            ],
        },
    )
    assert _onsets(cohort, "treated_prediabetes") == {
        "A": "2016-02-01",
        "B": None,
        "C": None,
        "D": None,
    }


def test_coded_measure_category(tmp_path: Path) -> None:
    definition = """\
condition: smoker
title: Current smoker
about: test definition
evidence:
  current: {measurement: {measure: smoking, category: [current]}}
rules:
  - {name: recorded current smoker, need: {current: 1}}
"""
    cohort = _build(
        tmp_path,
        {"smoker": definition},
        ["smoker"],
        {
            "measurements": [
                {
                    "patient_id": "A",
                    "obs_date": "2014-05-01",
                    "measure": "smoking",
                    "value_text": " Current ",
                },
                {
                    "patient_id": "B",
                    "obs_date": "2014-05-01",
                    "measure": "smoking",
                    "value_text": "never",
                },
            ]
        },
    )
    assert _onsets(cohort, "smoker") == {"A": "2014-05-01", "B": None}


def _catalog_problems(tmp_path: Path, files: dict[str, str]) -> list[str]:
    folder = tmp_path / "conditions"
    folder.mkdir()
    for name, text in files.items():
        (folder / f"{name}.yaml").write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError) as caught:
        load_catalog(folder)
    return [str(p).replace(str(folder) + "/", "") for p in caught.value.problems]


def test_definition_cycle_prints_the_chain(tmp_path: Path) -> None:
    a = (
        "condition: a\ntitle: A\nabout: x\nevidence:\n  other: {condition: b}\n"
        "rules:\n  - {name: r, need: {other: 1}}\n"
    )
    b = (
        "condition: b\ntitle: B\nabout: x\nevidence:\n  other: {condition: a}\n"
        "rules:\n  - {name: r, need: {other: 1}}\n"
    )
    assert _catalog_problems(tmp_path, {"a": a, "b": b}) == [
        "a.yaml:1:1 [definition-cycle] conditions refer to each other in a cycle: a -> b -> a"
    ]


def test_unknown_referenced_condition(tmp_path: Path) -> None:
    text = DIABETES.replace("code: {diagnosis: {ICD10: [E10-E14]}}", "code: {condition: diabetis}")
    assert _catalog_problems(tmp_path, {"diabetes": text}) == [
        "diabetes.yaml:5:21 [unknown-condition] evidence 'code' refers to condition 'diabetis', "
        "which is not defined; did you mean 'diabetes'?"
    ]


@pytest.mark.parametrize(
    ("codes", "message"),
    [
        ("[E14-E10]", "range 'E14-E10' is reversed: E14 comes after E10"),
        (
            "[E10-]",
            "'E10-' is not a valid ICD-10 code or prefix: expected a letter and two characters, "
            "then up to four more after an optional dot, e.g. E11.9",
        ),
        ("[E1.1x]", "'E1.1x' is not a valid ICD-10 code or prefix"),
        ("[E10-E1]", "'E10-E1' is not a valid ICD-10 code or prefix"),
        ("[E10-E11.9]", "range 'E10-E11.9': both ends must have the same length"),
    ],
)
def test_bad_code_lists_are_located(tmp_path: Path, codes: str, message: str) -> None:
    text = DIABETES.replace("[E10-E14]", codes)
    (problem,) = _catalog_problems(tmp_path, {"diabetes": text})
    assert problem.startswith("diabetes.yaml:5:")
    assert f"[bad-value] evidence.code.diagnosis.ICD10[0]: {message}" in problem


def test_wrong_unit_in_threshold_is_located(tmp_path: Path) -> None:
    text = (
        "condition: low\ntitle: Low\nabout: x\nevidence:\n"
        "  low: {measurement: {measure: egfr, below: 60 mmol/mol}}\n"
        "rules:\n  - {name: r, need: {low: 1}}\n"
    )
    (problem,) = _catalog_problems(tmp_path, {"low": text})
    assert problem.startswith("low.yaml:5:")
    assert (
        "[bad-value] evidence.low.measurement.below: unit 'mmol/mol' cannot be converted for egfr"
        in (problem)
    )


@pytest.mark.parametrize("code", ["A", "A10", "A10B", "A10BA", "A10BA02", "C09AA05"])
def test_atc_levels_accepted(code: str) -> None:
    # WHO ATC structure (WHOCC): levels of 1, 3, 4, 5 and 7 characters
    assert check_code("ATC", code) == code


@pytest.mark.parametrize("code", ["A1", "A10B2", "A10BA2", "A10BA023", "10BA02"])
def test_atc_malformed_rejected(code: str) -> None:
    # WHO ATC structure (WHOCC): A1, A10B2, A10BA2 are not levels of the hierarchy
    with pytest.raises(ValueError, match="is not a valid WHO ATC code or prefix"):
        check_code("ATC", code)


@pytest.mark.parametrize(
    ("rule", "message"),
    [
        (
            "{name: r, need: {code: 1}, absent_window: [null, 365]}",
            "absent_window is given but the rule lists no absent evidence",
        ),
        (
            "{name: r, need: {code: 1}, absent: [other], absent_window: [30, -30]}",
            "absent_window starts (30) after it ends (-30)",
        ),
    ],
)
def test_bad_absent_window_is_located(tmp_path: Path, rule: str, message: str) -> None:
    text = (
        "condition: a\ntitle: A\nabout: x\nevidence:\n  code: {diagnosis: {ICD10: [E11]}}\n"
        f"  other: {{diagnosis: {{ICD10: [E10]}}}}\nrules:\n  - {rule}\n"
    )
    problems = _catalog_problems(tmp_path, {"a": text})
    assert f"a.yaml:8:5 [bad-value] rules[0]: {message}" in problems


def test_absent_window_keeps_a_case_a_later_record_would_have_undone(tmp_path: Path) -> None:
    bounded = TYPE2.replace("absent: [t1_code]}", "absent: [t1_code], absent_window: [null, 0]}")
    cohort = _build(
        tmp_path,
        {"diabetes": DIABETES, "type2": bounded},
        ["diabetes", "type2"],
        {
            "diagnoses": [
                _dx("B", "2016-01-01", "E11.9"),
                _dx("B", "2016-06-01", "E11.9"),
                _dx("B", "2019-05-01", "E10.9"),  # after the onset: outside [null, 0]
                _dx("C", "2016-01-01", "E11.9"),
                _dx("C", "2016-06-01", "E11.9"),
                _dx("C", "2016-06-01", "E10.9"),  # on the onset day: inside the window
            ]
        },
    )
    # The same patient B as in test_condition_reference_and_absent_evidence is now a case.
    assert _onsets(cohort, "type2") == {"B": "2016-06-01", "C": None}
