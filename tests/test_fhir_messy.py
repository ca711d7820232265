"""FHIR bulk exports as real servers write them: statuses, references, stray lines, OIDs, UCUM.

``tests/fixtures/fhir_messy`` holds four fictional Orvane Bay patients (OB-201 to OB-204) and,
around them, every kind of line the reader must set aside, written by hand. Each line and the
reason expected for it (hand-counted from the files, never from a run):

- Patient.ndjson: lines 1-4 patients; 5 a Practitioner and 6 a Bundle (other resource type);
  7 ``null`` and 9 a line cut off (malformed line); 8 blank (no resource, not a row).
- Encounter.ndjson: 1-16 four encounters per patient; 17 entered-in-error; 18 cancelled; 19
  no subject and 20 a Group subject (no patient reference); 21 dated ``2014`` (year-only
  date); 22 patient OB-205, whose line is cut off (orphan patient); 23 a Bundle.
- Condition.ndjson: I50.9 for OB-201 refuted (1) and entered-in-error (2); for OB-202
  provisional (3) and differential (4), both used; OB-203 confirmed (5); OB-204 ICD-10-CM and
  ICD-9-CM given by OID (6, 7); 8 a Bundle; 9 no onset nor recordedDate (missing date); 10
  onset ``2016`` (year-only date).
- MedicationRequest.ndjson: 1 furosemide by a contained Medication; 2 furosemide by
  ``Medication/med-furo``; 3 amlodipine and 4 ramipril, both RxNorm only, by reference, same
  patient and day (unknown code system, two rows: not one exact duplicate); 5 cancelled; 6
  entered-in-error; 7 a reference to no Medication; 8 stop before start.
- MedicationStatement.ndjson: 1 not-taken furosemide; 2 entered-in-error; 3 metformin, used.
- Observation.ndjson: 1 weight 180 [lb_av]; 2 height 65 [in_i]; 3 creatinine 0.09 mmol/L; 4
  smoking as SNOMED CT 8517006 (ex-smoker); 5 HbA1c dated by ``issued`` only; 6 a
  ``valueInteger`` without unit (unit not convertible); 7 an SBP with its own value and a DBP
  component (two rows); 8 cancelled; 9 entered-in-error; 10 no subject; 11 cut off.
"""

from __future__ import annotations

import csv
import gzip
import importlib
import json
import shutil
from pathlib import Path

import polars as pl
import pytest

from pipeline.compile._quality import SET_ASIDE_REASONS
from pipeline.errors import ExtractError, UnusableBuildError
from pipeline.extract.readers.fhir import READER_REASONS, STATUS_SET_ASIDE
from pipeline.workflows.build import BuildOptions, build_study
from pipeline.workflows.profile import profile_extract

from .conftest import DEMO_STUDY, ROOT
from .test_fhir import _source_rows

MESSY = ROOT / "tests" / "fixtures" / "fhir_messy"
# Lines that are deliberately not resources: (file, line).
NOT_RESOURCES = {("Patient.ndjson", 7), ("Patient.ndjson", 9), ("Observation.ndjson", 11)}

EXPECTED_QUALITY = {
    ("patients", "used"): (4, None),
    ("patients", "other resource type"): (2, "Patient.ndjson:5"),
    ("patients", "malformed line"): (2, "Patient.ndjson:7"),
    ("encounters", "used"): (16, None),
    ("encounters", "entered in error"): (1, "Encounter.ndjson:17"),
    ("encounters", "cancelled"): (1, "Encounter.ndjson:18"),
    ("encounters", "no patient reference"): (2, "Encounter.ndjson:19"),
    ("encounters", "year-only date"): (1, "Encounter.ndjson:21"),
    ("encounters", "orphan patient"): (1, "Encounter.ndjson:22"),
    ("encounters", "other resource type"): (1, "Encounter.ndjson:23"),
    ("diagnoses", "used"): (5, None),
    ("diagnoses", "refuted"): (1, "Condition.ndjson:1"),
    ("diagnoses", "entered in error"): (1, "Condition.ndjson:2"),
    ("diagnoses", "other resource type"): (1, "Condition.ndjson:8"),
    ("diagnoses", "missing date"): (1, "Condition.ndjson:9"),
    ("diagnoses", "year-only date"): (1, "Condition.ndjson:10"),
    ("prescriptions", "used"): (3, None),
    ("prescriptions", "unknown code system"): (2, "MedicationRequest.ndjson:3"),
    ("prescriptions", "cancelled"): (1, "MedicationRequest.ndjson:5"),
    # MedicationRequest line 6 and MedicationStatement line 2; the first file is named.
    ("prescriptions", "entered in error"): (2, "MedicationRequest.ndjson:6"),
    ("prescriptions", "medication not found"): (1, "MedicationRequest.ndjson:7"),
    ("prescriptions", "stop date before start date"): (1, "MedicationRequest.ndjson:8"),
    ("prescriptions", "not taken"): (1, "MedicationStatement.ndjson:1"),
    ("measurements", "used"): (7, None),
    ("measurements", "unit not convertible"): (1, "Observation.ndjson:6"),
    ("measurements", "cancelled"): (1, "Observation.ndjson:8"),
    ("measurements", "entered in error"): (1, "Observation.ndjson:9"),
    ("measurements", "no patient reference"): (1, "Observation.ndjson:10"),
    ("measurements", "malformed line"): (1, "Observation.ndjson:11"),
}


def test_fixture_resources_are_valid_fhir() -> None:
    # Source: the `fhir.resources` package (8.x), R4B models, as in tests/test_fhir.py; the
    # lines that are meant not to be resources are the only ones that are not.
    pytest.importorskip("fhir.resources.R4B")
    checked, refused = 0, set()
    for path in sorted(MESSY.glob("*.ndjson")):
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
            if not line.strip():
                continue
            try:
                resource = json.loads(line)
            except json.JSONDecodeError:
                refused.add((path.name, number))
                continue
            if not isinstance(resource, dict):
                refused.add((path.name, number))
                continue
            kind = str(resource["resourceType"])
            module = importlib.import_module(f"fhir.resources.R4B.{kind.lower()}")
            getattr(module, kind).model_validate(resource)
            checked += 1
    assert refused == NOT_RESOURCES
    assert checked == 63  # 67 lines: one blank, three not resources


@pytest.fixture(scope="module")
def build(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("fhir_messy") / "out"
    return build_study(DEMO_STUDY, BuildOptions(extract=MESSY, out=out)).out


def _quality(out: Path) -> dict[tuple[str, str], tuple[int, str | None]]:
    with (out / "quality.csv").open(encoding="utf-8") as handle:
        return {
            (r["source_table"], r["reason"]): (
                int(r["n_rows"]),
                f"{r['first_file']}:{r['first_row']}" if r["first_file"] else None,
            )
            for r in csv.DictReader(handle)
        }


def test_quality_log_gives_each_line_its_reason(build: Path) -> None:
    assert _quality(build) == EXPECTED_QUALITY


def test_statuses_and_references_decide_the_outcomes(build: Path) -> None:
    cohort = pl.read_parquet(build / "cohort.parquet").sort("patient_id")
    assert cohort["patient_id"].to_list() == ["OB-201", "OB-202", "OB-203", "OB-204"]
    hf = dict(zip(cohort["patient_id"], cohort["incident_heart_failure"], strict=True))
    onset = dict(zip(cohort["patient_id"], cohort["onset_heart_failure"], strict=True))
    # OB-201: a refuted and an entered-in-error I50.9 beside a loop diuretic make no case.
    # OB-202: a provisional I50.9 (2016-06-01) and furosemide through Medication/med-furo the
    # next day meet "code and loop diuretic" on 2016-06-02.
    # OB-203: one confirmed I50.9 and a not-taken (and a cancelled) furosemide: no case.
    assert hf == {"OB-201": False, "OB-202": True, "OB-203": False, "OB-204": False}
    assert onset["OB-202"].isoformat() == "2016-06-02"
    # UCUM [lb_av] and [in_i], exact by definition: 180 lb, 65 in.
    bmi = dict(zip(cohort["patient_id"], cohort["bmi"], strict=True))
    # (the cohort rounds BMI to 5 decimals)
    assert bmi["OB-201"] == pytest.approx(180 * 0.45359237 / (65 * 2.54 / 100) ** 2, abs=5e-6)
    sbp = dict(zip(cohort["patient_id"], cohort["sbp"], strict=True))
    assert sbp["OB-204"] == 150.0  # the parent's own value, kept beside its component


def test_codes_units_and_dates_as_read() -> None:
    rows = _source_rows(MESSY)
    # diagnoses: patient_id, event_date, code_system, code, source
    assert ("OB-204", "2016-09-01", "ICD10", "E119", "visit") in rows["diagnoses"]
    assert ("OB-204", "2016-10-01", "ICD9", "250.00", "visit") in rows["diagnoses"]
    # measurements: patient_id, obs_date, measure, unit, value, value_text
    measurements = rows["measurements"]
    assert ("OB-202", "2014-06-01", "smoking", None, None, "former") in measurements
    assert ("OB-202", "2014-06-01", "creatinine", "mmol/L", "0.09", None) in measurements
    assert ("OB-203", "2016-02-02", "hba1c", "%", "7.0", None) in measurements  # issued
    assert ("OB-203", "2014-06-01", "sbp", None, "135", None) in measurements  # valueInteger
    assert ("OB-204", "2014-06-01", "dbp", "mm[Hg]", "95", None) in measurements
    # prescriptions: patient_id, start_date, atc, stop_date
    prescriptions = rows["prescriptions"]
    assert ("OB-201", "2016-04-02", "C03CA01", None) in prescriptions  # contained Medication
    assert ("OB-202", "2016-06-02", "C03CA01", None) in prescriptions  # Medication.ndjson
    # amlodipine and ramipril without ATC, same patient and day: two rows, both set aside as
    # an unknown code system (see the quality log), never one and an exact duplicate
    assert prescriptions.count(("OB-202", "2016-06-02", None, None)) == 2


def test_every_reason_the_reader_gives_is_classified() -> None:
    assert set(READER_REASONS) <= set(SET_ASIDE_REASONS)
    statuses = {r for kinds in STATUS_SET_ASIDE.values() for r in kinds.values()}
    assert statuses == {"entered in error", "refuted", "not taken", "cancelled"}
    for reason in statuses:  # recorded as not having happened: never stops a build
        assert not SET_ASIDE_REASONS[reason].misread


def _copy(tmp_path: Path, *names: str) -> Path:
    folder = tmp_path / "extract"
    folder.mkdir()
    for name in names:
        shutil.copy(MESSY / name, folder / name)
    return folder


def test_empty_patient_file_is_refused_like_a_missing_one(tmp_path: Path) -> None:
    folder = _copy(tmp_path, "Encounter.ndjson")
    (folder / "Patient.ndjson").write_text("\n\n", encoding="utf-8")
    with pytest.raises(ExtractError, match=r"without Patient resources \(Patient.ndjson empty\)"):
        build_study(DEMO_STUDY, BuildOptions(extract=folder, out=tmp_path / "out"))
    assert not (tmp_path / "out").exists()


def test_byte_order_mark_crlf_and_gzip_are_read(tmp_path: Path) -> None:
    folder = _copy(tmp_path, "Encounter.ndjson", "Condition.ndjson")
    text = (MESSY / "Patient.ndjson").read_text(encoding="utf-8")
    crlf = "\ufeff" + text.replace("\n", "\r\n")
    with gzip.open(folder / "Patient.ndjson.gz", "wt", encoding="utf-8", newline="") as handle:
        handle.write(crlf)
    rows = _source_rows(folder)
    # the two malformed lines, four patients, then the Practitioner's and the Bundle's ids (set
    # aside as another resource type)
    ids = [None, None, "OB-201", "OB-202", "OB-203", "OB-204", "PR-01", "bundle-p1"]
    assert [r[0] for r in rows["patients"]] == ids
    out = build_study(DEMO_STUDY, BuildOptions(extract=folder, out=tmp_path / "out")).out
    quality = _quality(out)
    assert quality["patients", "malformed line"] == (2, "Patient.ndjson.gz:7")


def test_mostly_malformed_lines_stop_the_build_with_file_and_line(tmp_path: Path) -> None:
    folder = _copy(tmp_path, "Patient.ndjson", "Encounter.ndjson")
    good = (MESSY / "Observation.ndjson").read_text(encoding="utf-8").splitlines()[0]
    lines = [good, '{"resourceType":"Observation",', "<html>", "{'single': 'quotes'}"]
    (folder / "Observation.ndjson").write_text("\n".join(lines) + "\n", encoding="utf-8")
    with pytest.raises(UnusableBuildError, match=r"malformed line.*Observation.ndjson row 2"):
        build_study(DEMO_STUDY, BuildOptions(extract=folder, out=tmp_path / "out"))


def test_profile_counts_what_the_build_counts(tmp_path: Path) -> None:
    # One more copy of OB-202's line: a duplicate id the profile names with its two lines.
    folder = tmp_path / "extract"
    shutil.copytree(MESSY, folder)
    second = (MESSY / "Patient.ndjson").read_text(encoding="utf-8").splitlines()[1]
    with (folder / "Patient.ndjson").open("a", encoding="utf-8") as handle:
        handle.write(second + "\n")
    profile = profile_extract(folder)
    tables = profile["tables"]
    assert tables["patients"]["duplicate_patient_ids"] == [
        {"patient_id": "OB-202", "rows": 2, "where": ["Patient.ndjson:2", "Patient.ndjson:10"]}
    ]
    for (table, reason), (n_rows, first) in EXPECTED_QUALITY.items():
        if reason in READER_REASONS:
            assert tables[table]["set_aside_by_reader"][reason] == {"rows": n_rows, "first": first}
    assert tables["encounters"]["orphan_rows"] == 1  # OB-205, as the build counts it
    assert tables["encounters"]["rows_without_patient"] == 2
    assert tables["measurements"]["rows_without_patient"] == 1
    assert tables["diagnoses"]["missing_dates"] == 1
    assert all(tables[t]["orphan_rows"] == 0 for t in ("diagnoses", "prescriptions"))
