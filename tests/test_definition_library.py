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

from pipeline.config import load_catalog
from pipeline.workflows.build import BuildOptions, build_study

ROOT = Path(__file__).resolve().parent.parent
CONDITIONS = ROOT / "definitions" / "conditions"

EXISTING = {"type2_diabetes", "ckd", "heart_failure", "hypertension"}
REVIEWED = {"type2_diabetes", "heart_failure"}
"""Demo definitions changed by the clinical review, with test patients here too."""
LIBRARY = {
    "kidney_replacement",
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
        # Insulin-only: metformin 366 days after the rule is met, past the 365-day window.
        "T1-METFORMIN-366": {
            "rows": [
                ("dx", "2016-03-01", "ICD10", "E11.9"),
                ("rx", "2016-04-01", "A10AE04"),
                ("rx", "2017-04-02", "A10BA02"),
            ],
            "expect": "2016-04-01",
        },
        # Metformin 365 days after: inside the window, the insulin-only rule is not met.
        "T1-METFORMIN-365": {
            "rows": [
                ("dx", "2016-03-01", "ICD10", "E11.9"),
                ("rx", "2016-04-01", "A10AE04"),
                ("rx", "2017-04-01", "A10BA02"),
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
    "type2_diabetes": {
        # ICD-9-CM type 1 codes (fifth digit 1 or 3), dotted or not: none counts, not even
        # with a glucose-lowering drug.
        "T2-ICD9-TYPE1": {
            "rows": [
                ("dx", "2016-01-05", "ICD9", "250.01"),
                ("dx", "2016-03-01", "ICD9", "25013"),
                ("dx", "2016-06-01", "ICD9", "250.91"),
                ("rx", "2016-06-02", "A10BA02"),
            ],
            "expect": None,
        },
        # Fifth digit 0 and 2 are type 2: two codes on distinct days.
        "T2-ICD9-TWO": {
            "rows": [
                ("dx", "2016-01-05", "ICD9", "250.00"),
                ("dx", "2016-06-01", "ICD9", "250.02"),
            ],
            "expect": "2016-06-01",
        },
        # 250.40 undotted (type 2 with renal manifestations) and metformin.
        "T2-ICD9-DRUG": {
            "rows": [("dx", "2016-02-01", "ICD9", "25040"), ("rx", "2016-03-01", "A10BA02")],
            "expect": "2016-03-01",
        },
    },
    "heart_failure": {
        # Hypertensive heart disease with heart failure, and a loop diuretic.
        "HF-I11": {
            "rows": [("dx", "2016-01-01", "ICD10", "I11.0"), ("rx", "2016-02-01", "C03CA01")],
            "expect": "2016-02-01",
        },
        # Hypertensive heart and kidney disease with heart failure, twice.
        "HF-I13": {
            "rows": [
                ("dx", "2016-01-01", "ICD10", "I13.2"),
                ("dx", "2016-05-01", "ICD10", "I13.0"),
            ],
            "expect": "2016-05-01",
        },
        "HF-ICD9": {
            "rows": [
                ("dx", "2016-01-01", "ICD9", "402.91"),
                ("dx", "2016-03-01", "ICD9", "40493"),
            ],
            "expect": "2016-03-01",
        },
        # The same diseases without heart failure: I11.9, I13.1, 402.90, 404.92.
        "HF-WITHOUT": {
            "rows": [
                ("dx", "2016-01-01", "ICD10", "I11.9"),
                ("dx", "2016-02-01", "ICD10", "I13.1"),
                ("dx", "2016-03-01", "ICD9", "402.90"),
                ("dx", "2016-04-01", "ICD9", "404.92"),
                ("rx", "2016-04-01", "C03CA01"),
            ],
            "expect": None,
        },
    },
    "kidney_replacement": {
        "KR-TWO": {
            "rows": [
                ("dx", "2016-01-01", "ICD10", "Z99.2"),
                ("dx", "2016-04-01", "ICD10", "Z94.0"),
            ],
            "expect": "2016-04-01",
        },
        "KR-ICD9": {
            "rows": [
                ("dx", "2016-01-01", "ICD9", "V45.11"),
                ("dx", "2016-02-01", "ICD9", "V42.0"),
            ],
            "expect": "2016-02-01",
        },
        "KR-PROBLEM": {
            "rows": [("dx", "2016-02-01", "ICD10", "Z49.1", "problem_list")],
            "expect": "2016-02-01",
        },
        # Stage 5 CKD codes are not kidney replacement; one dialysis code on a visit is not
        # enough; V45.12 (noncompliance with dialysis) is not V45.11.
        "KR-CKD": {
            "rows": [
                ("dx", "2016-01-01", "ICD10", "N18.5"),
                ("dx", "2016-02-01", "ICD10", "N18.5"),
                ("dx", "2016-03-01", "ICD10", "Z49.1"),
                ("dx", "2016-04-01", "ICD9", "V45.12"),
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
        # ICD-10-CM adult BMI 35.0-35.9 with a BMI of 35.5 the same day.
        "OB-Z68": {
            "rows": [
                ("dx", "2016-01-01", "ICD10", "Z68.35"),
                ("ms", "2016-01-01", "bmi", "35.5", "kg/m2"),
            ],
            "expect": "2016-01-01",
        },
        # ICD-9-CM adult BMI 40.0-44.9, then a BMI of 42.
        "OB-V85": {
            "rows": [
                ("dx", "2016-01-01", "ICD9", "V85.41"),
                ("ms", "2016-03-01", "bmi", "42", "kg/m2"),
            ],
            "expect": "2016-03-01",
        },
        # Obesity hypoventilation syndrome, then a BMI of 33.
        "OB-27803": {
            "rows": [
                ("dx", "2016-01-01", "ICD9", "278.03"),
                ("ms", "2016-05-01", "bmi", "33", "kg/m2"),
            ],
            "expect": "2016-05-01",
        },
        # Adult BMI 29 (Z68.29) and children's BMI-for-age (Z68.54) are not obesity codes here.
        "OB-OTHER-Z68": {
            "rows": [
                ("dx", "2016-01-01", "ICD10", "Z68.29"),
                ("dx", "2016-01-02", "ICD10", "Z68.54"),
                ("ms", "2016-03-01", "bmi", "31", "kg/m2"),
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
        # Delirium superimposed on dementia, then senile degeneration of the brain.
        "DM-F051-G311": {
            "rows": [
                ("dx", "2016-01-01", "ICD10", "F05.1"),
                ("dx", "2016-04-01", "ICD10", "G31.1"),
            ],
            "expect": "2016-04-01",
        },
        # Dementia with Lewy bodies (ICD-10-CM) and donepezil.
        "DM-LEWY": {
            "rows": [("dx", "2016-01-01", "ICD10", "G31.83"), ("rx", "2016-01-15", "N06DA02")],
            "expect": "2016-01-15",
        },
        "DM-ICD9-SENILE": {
            "rows": [("dx", "2016-01-01", "ICD9", "331.2"), ("dx", "2016-02-01", "ICD9", "331.2")],
            "expect": "2016-02-01",
        },
        # Alcoholic degeneration (G31.2) and WHO's broad G31.8 are not dementia codes here.
        "DM-G31-OTHER": {
            "rows": [
                ("dx", "2016-01-01", "ICD10", "G31.2"),
                ("dx", "2016-02-01", "ICD10", "G31.8"),
                ("rx", "2016-02-01", "N06DA02"),
            ],
            "expect": None,
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


def test_every_definition_states_its_provenance() -> None:
    catalog = load_catalog(CONDITIONS)
    for name, condition in catalog.conditions.items():
        provenance = condition.provenance
        assert provenance is not None, name
        # Either a publication as "Author et al., year" or our own work, said plainly.
        assert provenance.adapts.startswith("our own") or " et al., " in provenance.adapts, name
        assert "ICD-10" in provenance.icd_edition, name
        assert "ICD-9-CM" in provenance.icd_edition, name
    reviewed = {"type1_diabetes", "type2_diabetes", "heart_failure", "dementia", "obesity"}
    for name in reviewed:
        assert catalog.conditions[name].provenance.version == "1.1", name  # type: ignore[union-attr]


def test_obesity_makes_no_adult_only_claim_it_does_not_check() -> None:
    # The rules have no age test, so neither the title nor the text may promise adults only.
    obesity = load_catalog(CONDITIONS).conditions["obesity"]
    assert "adult" not in obesity.title.lower()
    assert "Adults only" not in obesity.about
    assert "The rules do not check age" in obesity.about


def test_ckd_has_no_kidney_replacement_codes() -> None:
    # Dialysis and transplant status live in kidney_replacement; the demo's ckd keeps its rules.
    catalog = load_catalog(CONDITIONS)
    ckd = catalog.conditions["ckd"]
    codes = [c for ev in ckd.evidence.values() if ev.diagnosis for c in ev.diagnosis.ICD10]
    codes += [c for ev in ckd.evidence.values() if ev.diagnosis for c in ev.diagnosis.ICD9]
    assert not [c for c in codes if c.startswith(("Z49", "Z99", "Z94", "V45", "V42"))]
    assert [r.name for r in ckd.rules] == [
        "two low eGFR at least 90 days apart",
        "two CKD stage 3-6 codes",
    ]


def test_every_library_condition_has_test_patients() -> None:
    assert set(CASES) == LIBRARY | REVIEWED
    for name, patients in CASES.items():
        outcomes = [spec["expect"] for spec in patients.values()]
        assert any(o is None for o in outcomes), f"{name}: no non-case"
        assert any(o is not None for o in outcomes), f"{name}: no case"


@pytest.mark.parametrize("condition", sorted(LIBRARY | REVIEWED))
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
