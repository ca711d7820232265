"""The starter library of case definitions: it loads, and each definition finds its cases.

Each condition gets its own tiny extract of fictional patients, written here by hand: some meet
one rule (the expected onset is the date the rule is first met, worked out by hand from the
definition file), others are near misses that must stay non-cases (a date too far apart, a code
or drug outside the definition, an excluded code, a drug that is never allowed). Every patient
is eligible for the study (index 2015-03-10, age 59, history from 2012) and at risk of the
outcome at index, so every patient appears in the cohort.
"""

from __future__ import annotations

import csv
from pathlib import Path

import polars as pl
import pytest

from pipeline._build import BuildOptions, build_study
from pipeline.config import load_catalog

ROOT = Path(__file__).resolve().parent.parent
CONDITIONS = ROOT / "definitions" / "conditions"

EXISTING = {"type2_diabetes", "ckd", "heart_failure", "hypertension"}
LIBRARY = {
    "type1_diabetes",
    "copd",
    "asthma",
    "depression",
    "osteoarthritis",
    "atrial_fibrillation",
    "ischaemic_heart_disease",
    "obesity",
    "dementia",
}

# Rows per patient: ("dx", date, system, code[, source]), ("rx", date, atc),
# ("ms", date, measure, value, unit). "expect" is the onset date, or None for a non-case.
CASES: dict[str, dict[str, dict]] = {
    "type1_diabetes": {
        "T1-TWO": {
            "rows": [
                ("dx", "2016-01-05", "ICD10", "E10.9"),
                ("dx", "2016-06-01", "ICD10", "E10.9"),
            ],
            "expect": "2016-06-01",
        },
        "T1-ICD9-INS": {
            "rows": [("dx", "2016-02-01", "ICD9", "250.01"), ("rx", "2016-05-01", "A10AB01")],
            "expect": "2016-05-01",
        },
        "T1-INS-ONLY": {
            "rows": [("dx", "2016-03-01", "ICD10", "E11.9"), ("rx", "2016-04-01", "A10AE04")],
            "expect": "2016-04-01",
        },
        # Same as above, but metformin once, long before: the insulin-only rule is not met.
        "T1-METFORMIN": {
            "rows": [
                ("rx", "2013-01-01", "A10BA02"),
                ("dx", "2016-03-01", "ICD10", "E11.9"),
                ("rx", "2016-04-01", "A10AE04"),
            ],
            "expect": None,
        },
        # Two type 1 codes on the same day; ICD-9 250.02 is type 2 (fifth digit 2).
        "T1-SAMEDAY": {
            "rows": [
                ("dx", "2016-01-05", "ICD10", "E10.9"),
                ("dx", "2016-01-05", "ICD10", "E10.1"),
                ("dx", "2016-02-05", "ICD9", "250.02"),
                ("dx", "2016-08-05", "ICD9", "250.02"),
            ],
            "expect": None,
        },
    },
    "copd": {
        "CO-TWO": {
            "rows": [
                ("dx", "2015-06-01", "ICD10", "J44.9"),
                ("dx", "2016-01-10", "ICD10", "J43.9"),
            ],
            "expect": "2016-01-10",
        },
        "CO-ICD9-DRUG": {
            "rows": [("dx", "2016-02-01", "ICD9", "496"), ("rx", "2016-12-01", "R03AL03")],
            "expect": "2016-12-01",
        },
        # Code and drug 458 days apart; asthma codes are not COPD codes.
        "CO-FAR": {
            "rows": [("dx", "2015-06-01", "ICD10", "J44.9"), ("rx", "2016-09-01", "R03AC02")],
            "expect": None,
        },
        "CO-ASTHMA": {
            "rows": [
                ("dx", "2015-06-01", "ICD10", "J45.9"),
                ("dx", "2016-01-01", "ICD10", "J45.9"),
            ],
            "expect": None,
        },
    },
    "asthma": {
        "AS-DRUG": {
            "rows": [("dx", "2015-05-01", "ICD10", "J45.9"), ("rx", "2015-05-01", "R03AC02")],
            "expect": "2015-05-01",
        },
        "AS-ICD9": {
            "rows": [
                ("dx", "2016-01-01", "ICD9", "493.90"),
                ("dx", "2017-06-01", "ICD9", "493.00"),
            ],
            "expect": "2017-06-01",
        },
        # Two codes 792 days apart; a COPD code with an inhaler is not asthma.
        "AS-FAR": {
            "rows": [
                ("dx", "2015-05-01", "ICD10", "J45.0"),
                ("dx", "2017-07-01", "ICD10", "J45.0"),
            ],
            "expect": None,
        },
        "AS-COPD": {
            "rows": [("dx", "2015-05-01", "ICD10", "J44.9"), ("rx", "2015-05-02", "R03BB04")],
            "expect": None,
        },
    },
    "depression": {
        "DE-DRUG": {
            "rows": [("dx", "2016-01-10", "ICD10", "F32.1"), ("rx", "2016-01-20", "N06AB06")],
            "expect": "2016-01-20",
        },
        "DE-ICD9": {
            "rows": [("dx", "2015-09-01", "ICD9", "311"), ("dx", "2016-03-01", "ICD9", "296.32")],
            "expect": "2016-03-01",
        },
        # An antidepressant with an anxiety code; bipolar codes are outside the definition.
        "DE-ANXIETY": {
            "rows": [("dx", "2015-06-01", "ICD10", "F41.1"), ("rx", "2015-06-01", "N06AA09")],
            "expect": None,
        },
        # A depression code with an anxiolytic (N05B) rather than an antidepressant.
        "DE-ANXIOLYTIC": {
            "rows": [("dx", "2016-01-01", "ICD10", "F32.9"), ("rx", "2016-01-02", "N05BA01")],
            "expect": None,
        },
        "DE-BIPOLAR": {
            "rows": [
                ("dx", "2015-06-01", "ICD10", "F31.3"),
                ("dx", "2015-09-01", "ICD10", "F31.3"),
            ],
            "expect": None,
        },
    },
    "osteoarthritis": {
        "OA-PROBLEM": {
            "rows": [("dx", "2016-04-01", "ICD10", "M17.1", "problem_list")],
            "expect": "2016-04-01",
        },
        "OA-TWO": {
            "rows": [
                ("dx", "2015-08-01", "ICD10", "M16.9", "visit"),
                ("dx", "2016-02-01", "ICD9", "715.96", "billing"),
            ],
            "expect": "2016-02-01",
        },
        # One visit code only; rheumatoid arthritis is not osteoarthritis.
        "OA-ONE-VISIT": {
            "rows": [
                ("dx", "2015-08-01", "ICD10", "M17.9", "visit"),
                ("dx", "2016-01-01", "ICD10", "M05.9", "problem_list"),
            ],
            "expect": None,
        },
    },
    "atrial_fibrillation": {
        "AF-XA": {
            "rows": [("dx", "2015-10-01", "ICD10", "I48.0"), ("rx", "2015-10-15", "B01AF01")],
            "expect": "2015-10-15",
        },
        "AF-DABIGATRAN": {
            "rows": [("dx", "2016-03-01", "ICD10", "I48.9"), ("rx", "2016-02-01", "B01AE07")],
            "expect": "2016-03-01",
        },
        "AF-ICD9": {
            "rows": [
                ("dx", "2016-01-01", "ICD9", "427.31"),
                ("dx", "2016-01-02", "ICD9", "427.32"),
            ],
            "expect": "2016-01-02",
        },
        # Aspirin is not an anticoagulant; an anticoagulant for pulmonary embolism is not AF.
        "AF-ASPIRIN": {
            "rows": [("dx", "2016-01-01", "ICD10", "I48.9"), ("rx", "2016-01-05", "B01AC06")],
            "expect": None,
        },
        "AF-PE": {
            "rows": [("dx", "2016-01-01", "ICD10", "I26.9"), ("rx", "2016-01-01", "B01AF01")],
            "expect": None,
        },
    },
    "ischaemic_heart_disease": {
        "IH-MI": {
            "rows": [("dx", "2016-05-05", "ICD10", "I21.4")],
            "expect": "2016-05-05",
        },
        "IH-NITRATE": {
            "rows": [("dx", "2015-06-01", "ICD10", "I20.9"), ("rx", "2015-07-01", "C01DA14")],
            "expect": "2015-07-01",
        },
        "IH-ICD9": {
            "rows": [
                ("dx", "2015-05-01", "ICD9", "414.01"),
                ("dx", "2016-05-01", "ICD9", "414.01"),
            ],
            "expect": "2016-05-01",
        },
        # One angina code and a nitrate 458 days later.
        "IH-FAR": {
            "rows": [("dx", "2015-06-01", "ICD10", "I20.9"), ("rx", "2016-09-01", "C01DA08")],
            "expect": None,
        },
    },
    "obesity": {
        "OB-TWO-BMI": {
            "rows": [
                ("ms", "2015-06-01", "bmi", "31.2", "kg/m2"),
                ("ms", "2016-06-01", "bmi", "30.0", "kg/m2"),
            ],
            "expect": "2016-06-01",
        },
        "OB-CODE-BMI": {
            "rows": [
                ("dx", "2015-04-01", "ICD10", "E66.9"),
                ("ms", "2015-04-01", "bmi", "34", "kg/m2"),
            ],
            "expect": "2015-04-01",
        },
        # 100 kg / 1.75 m squared = 32.7 kg/m2 on both weight days.
        "OB-DERIVED": {
            "rows": [
                ("ms", "2014-01-01", "height", "175", "cm"),
                ("ms", "2016-01-01", "weight", "100", "kg"),
                ("ms", "2016-07-01", "weight", "100", "kg"),
            ],
            "expect": "2016-07-01",
        },
        # E66.3 (overweight) is excluded; one high BMI alone is not enough.
        "OB-OVERWEIGHT": {
            "rows": [
                ("dx", "2015-04-01", "ICD10", "E66.3"),
                ("ms", "2015-09-01", "bmi", "32", "kg/m2"),
                ("ms", "2016-02-01", "bmi", "29.9", "kg/m2"),
            ],
            "expect": None,
        },
        # Two high BMI values 792 days apart.
        "OB-FAR": {
            "rows": [
                ("ms", "2015-06-01", "bmi", "33", "kg/m2"),
                ("ms", "2017-08-01", "bmi", "31", "kg/m2"),
            ],
            "expect": None,
        },
    },
    "dementia": {
        "DM-DRUG": {
            "rows": [("dx", "2016-01-01", "ICD10", "F03"), ("rx", "2016-02-01", "N06DA02")],
            "expect": "2016-02-01",
        },
        "DM-MIXED": {
            "rows": [("dx", "2015-11-01", "ICD9", "331.0"), ("dx", "2016-03-01", "ICD10", "G30.9")],
            "expect": "2016-03-01",
        },
        # Delirium codes and an anti-dementia drug without a dementia code.
        "DM-DELIRIUM": {
            "rows": [
                ("dx", "2016-01-01", "ICD10", "F05.9"),
                ("dx", "2016-06-01", "ICD10", "F05.9"),
                ("rx", "2016-06-01", "N06DX01"),
            ],
            "expect": None,
        },
    },
}

STUDY = """\
study: library_check
title: One condition from the definition library
extract: {extract}
definitions: {definitions}
end_of_data: 2019-12-31
index:
  first_encounter:
    between: [2015-01-01, 2016-12-31]
eligibility:
  - sex: [F, M]
  - alive_at_index: true
  - age:
      between: [40, 85]
  - history_days: 730
  - at_risk_of_any_outcome: true
outcomes:
  conditions: [{condition}]
  horizon_days: 1461
followup:
  end_at: [death, end_of_data, horizon]
output:
  folder: {out}
"""

HEADERS = {
    "patients": ["patient_id", "birth_date", "sex", "death_date", "practice_id"],
    "encounters": ["patient_id", "encounter_date", "encounter_type"],
    "diagnoses": ["patient_id", "event_date", "code_system", "code", "source"],
    "prescriptions": ["patient_id", "start_date", "stop_date", "atc", "drug_text"],
    "measurements": ["patient_id", "obs_date", "measure", "value_text", "value", "unit"],
}


def _write_extract(folder: Path, patients: dict[str, dict]) -> None:
    tables: dict[str, list[list[str]]] = {name: [] for name in HEADERS}
    for pid, spec in patients.items():
        tables["patients"].append([pid, "1955-06-01", "F", "", "P01"])
        for day in ("2012-01-10", "2015-03-10", "2019-03-01"):
            tables["encounters"].append([pid, day, "visit"])
        for kind, day, *rest in spec["rows"]:
            if kind == "dx":
                system, code, *source = rest
                tables["diagnoses"].append([pid, day, system, code, *(source or ["visit"])])
            elif kind == "rx":
                tables["prescriptions"].append([pid, day, "", rest[0], ""])
            else:
                measure, value, unit = rest
                tables["measurements"].append([pid, day, measure, "", value, unit])
    folder.mkdir()
    for name, rows in tables.items():
        with (folder / f"{name}.csv").open("w", newline="", encoding="utf-8") as handle:
            writer = csv.writer(handle)
            writer.writerow(HEADERS[name])
            writer.writerows(rows)


def test_library_loads_with_the_expected_conditions() -> None:
    catalog = load_catalog(CONDITIONS)
    assert set(catalog.conditions) == EXISTING | LIBRARY
    for name in LIBRARY:
        assert "Research use only" in catalog.conditions[name].about, name


def test_every_library_condition_has_test_patients() -> None:
    assert set(CASES) == LIBRARY
    for name, patients in CASES.items():
        outcomes = [spec["expect"] for spec in patients.values()]
        assert any(o is None for o in outcomes), f"{name}: no non-case"
        assert any(o is not None for o in outcomes), f"{name}: no case"


@pytest.mark.parametrize("condition", sorted(LIBRARY))
def test_definition_finds_its_cases(condition: str, tmp_path: Path) -> None:
    patients = CASES[condition]
    _write_extract(tmp_path / "extract", patients)
    study = tmp_path / "study.yaml"
    study.write_text(
        STUDY.format(
            extract=tmp_path / "extract",
            definitions=CONDITIONS,
            condition=condition,
            out=tmp_path / "unused",
        ),
        encoding="utf-8",
    )
    build_study(study, BuildOptions(out=tmp_path / "out"))
    cohort = pl.read_parquet(tmp_path / "out" / "cohort.parquet")
    got = {
        row["patient_id"]: (None if row["onset"] is None else row["onset"].isoformat())
        for row in cohort.select("patient_id", pl.col(f"onset_{condition}").alias("onset")).rows(
            named=True
        )
    }
    assert got == {pid: spec["expect"] for pid, spec in patients.items()}
