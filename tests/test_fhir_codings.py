"""A FHIR export read as the study reads: SNOMED CT Condition codings and the study's own LOINC.

The FHIR reader learns what a study reads from the plan's sources (``SourceTable.code_systems``
for diagnoses, ``SourceTable.measure_codes`` for measurements). Hand-made Orvane Bay patients
(fictional), built through a real build from NDJSON files written in ``tmp_path``:

- FB-1: one Condition coded both ICD-10 ``I10`` and SNOMED CT ``CHILD`` on 2016-05-01.
- FB-2: two Conditions coded SNOMED CT ``CHILD`` only (2016-05-01, 2017-05-01).
- FB-3: one Condition coded ICD-10 ``I10`` only (2016-05-01).
- FB-4: serum urate 450 umol/L (LOINC 3084-1, the study's own measure file) on 2016-05-01.
- FB-5: serum urate 6.5 mg/dL (386.6 umol/L, below 420) on 2016-05-01.

Every patient passes the template study's eligibility (index 2015-03-02), so each event above is
incident. The SNOMED CT identifiers are made up (see ``tests/test_coding_systems.py``).
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import polars as pl

from pipeline.workflows.build import BuildOptions, build_study

from .helpers import eligible_encounters, write_study
from .test_code_lists import write_list
from .test_coding_systems import CHILD
from .test_measure_files import GOUT, URATE

SNOMED = "http://snomed.info/sct"
ICD10 = "http://hl7.org/fhir/sid/icd-10"
LOINC = "http://loinc.org"
UCUM = "http://unitsofmeasure.org"
PATIENTS = ("FB-1", "FB-2", "FB-3", "FB-4", "FB-5")


def _provenance() -> str:
    return (
        'provenance: {adapts: "our own, for this test", icd_edition: "ICD-10 (WHO)", '
        'version: "1", date: 2026-01-01}\n'
    )


def _condition(name: str, evidence: str, rules: str) -> str:
    return (
        f"condition: {name}\ntitle: {name} (test)\nabout: hypertension read from FHIR\n"
        f"{_provenance()}evidence:\n{evidence}rules:\n{rules}"
    )


SCT_EVIDENCE = "  sct:\n    diagnosis:\n      lists: [../codelists/htn_sct.csv]\n"
ICD_EVIDENCE = '  icd:\n    diagnosis:\n      ICD10: ["I10"]\n'

# A study reading SNOMED CT only: once, and twice (a rule counting rows).
SNOMED_ONLY = {
    "htn_once": _condition("htn_once", SCT_EVIDENCE, "  - {name: one, need: {sct: 1}}\n"),
    "htn_twice": _condition(
        "htn_twice", SCT_EVIDENCE, "  - {name: two, need: {sct: 2}, within_days: 730}\n"
    ),
    "gout": GOUT,
}
# A study reading both systems: a Condition coded in both meets a rule needing both.
BOTH = {
    "htn_both": _condition(
        "htn_both",
        SCT_EVIDENCE + ICD_EVIDENCE,
        "  - {name: both, need: {sct: 1, icd: 1}, within_days: 30}\n",
    ),
    "htn_icd": _condition("htn_icd", ICD_EVIDENCE, "  - {name: icd, need: {icd: 1}}\n"),
}


def _ref(patient: str) -> dict[str, str]:
    return {"reference": f"Patient/{patient}"}


def _coding(system: str, code: str) -> dict[str, str]:
    return {"system": system, "code": code}


def _conditions() -> list[dict[str, object]]:
    coded = [
        ("FB-1", "2016-05-01", [_coding(ICD10, "I10"), _coding(SNOMED, CHILD)]),
        ("FB-2", "2016-05-01", [_coding(SNOMED, CHILD)]),
        ("FB-2", "2017-05-01", [_coding(SNOMED, CHILD)]),
        ("FB-3", "2016-05-01", [_coding(ICD10, "I10")]),
    ]
    return [
        {
            "resourceType": "Condition",
            "id": f"c{n}",
            "subject": _ref(patient),
            "code": {"coding": codings},
            "onsetDateTime": date,
        }
        for n, (patient, date, codings) in enumerate(coded, start=1)
    ]


def _observations() -> list[dict[str, object]]:
    values = [("FB-4", 450, "umol/L"), ("FB-5", 6.5, "mg/dL")]
    return [
        {
            "resourceType": "Observation",
            "id": f"o{n}",
            "status": "final",
            "subject": _ref(patient),
            "code": {"coding": [_coding(LOINC, "3084-1")]},
            "effectiveDateTime": "2016-05-01",
            "valueQuantity": {"value": value, "unit": unit, "system": UCUM, "code": unit},
        }
        for n, (patient, value, unit) in enumerate(values, start=1)
    ]


def _write_export(folder: Path) -> Path:
    folder.mkdir(parents=True)
    patients = [
        {"resourceType": "Patient", "id": p, "birthDate": "1955-06-15", "gender": "female"}
        for p in PATIENTS
    ]
    encounters = [
        {
            "resourceType": "Encounter",
            "id": f"e{n}",
            "status": "finished",
            "subject": _ref(e["patient_id"]),
            "class": {"code": "visit"},
            "period": {"start": e["encounter_date"]},
        }
        for n, e in enumerate((e for p in PATIENTS for e in eligible_encounters(p)), start=1)
    ]
    for kind, resources in (
        ("Patient", patients),
        ("Encounter", encounters),
        ("Condition", _conditions()),
        ("Observation", _observations()),
    ):
        lines = "".join(json.dumps(r, sort_keys=True) + "\n" for r in resources)
        (folder / f"{kind}.ndjson").write_text(lines, encoding="utf-8")
    return folder


def _build(tmp_path: Path, conditions: dict[str, str]) -> Path:
    export = _write_export(tmp_path / "export")
    folder = tmp_path / "study"
    (folder / "measures").mkdir(parents=True)
    (folder / "measures" / "urate.yaml").write_text(URATE, encoding="utf-8")
    study = write_study(folder, conditions, sorted(conditions), extract=export)
    write_list(folder / "codelists", "htn_sct", f"{CHILD},Made-up concept,,\n", system="SNOMED",
               match="exact")  # fmt: skip
    study.write_text(study.read_text(encoding="utf-8") + "measures: [measures]\n", "utf-8")
    return build_study(study, BuildOptions(extract=export, out=tmp_path / "out")).out


def _incident(out: Path, condition: str) -> list[str]:
    cohort = pl.read_parquet(out / "cohort.parquet")
    return sorted(cohort.filter(pl.col(f"incident_{condition}"))["patient_id"].to_list())


def _used_rows(out: Path, table: str) -> int:
    with (out / "quality.csv").open(encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    return sum(
        int(r["n_rows"]) for r in rows if r["source_table"] == table and r["reason"] == "used"
    )


def test_snomed_codings_and_own_measure_read_from_fhir(tmp_path: Path) -> None:
    out = _build(tmp_path, SNOMED_ONLY)
    cohort = pl.read_parquet(out / "cohort.parquet")
    assert sorted(cohort["patient_id"].to_list()) == list(PATIENTS)
    # The SNOMED CT coding of a Condition matches the study's SNOMED CT list, alone or beside
    # an ICD-10 coding; FB-3's ICD-10-only Condition matches nothing.
    assert _incident(out, "htn_once") == ["FB-1", "FB-2"]
    # A study reading one system sees a Condition coded twice once: FB-1 has one row, so a rule
    # needing two rows is met by FB-2's two Conditions only.
    assert _incident(out, "htn_twice") == ["FB-2"]
    # FB-1 1 row (its SNOMED CT coding), FB-2 2, FB-3 1 (its known ICD-10 coding, used).
    assert _used_rows(out, "diagnoses") == 4
    # Serum urate by its LOINC code, a measure only the study's own file declares: read, in
    # either unit, and judged against 420 umol/L.
    assert _incident(out, "gout") == ["FB-4"]
    assert _used_rows(out, "measurements") == 2


def test_a_study_reading_both_systems_gets_a_row_per_coding(tmp_path: Path) -> None:
    out = _build(tmp_path, BOTH)
    # FB-1's one Condition gives a SNOMED CT row and an ICD-10 row: it meets a rule needing both.
    assert _incident(out, "htn_both") == ["FB-1"]
    assert _incident(out, "htn_icd") == ["FB-1", "FB-3"]
    # FB-1 2 rows, FB-2 2, FB-3 1.
    assert _used_rows(out, "diagnoses") == 5
