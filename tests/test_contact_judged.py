"""Contact with any activity reads each table's row judgement, measurements included.

A tiny hand-made FHIR export of the fictional Orvane Bay practice (written here, expectations
computed by hand). Both patients have a first encounter on 2016-01-01 (their index date) and an
HbA1c observation on 2016-06-01; the study reads HbA1c (a covariate), so its measurements are
activity, and ends follow-up 365 days after the last contact.

- OB-201's observation of 2017-03-01 was entered in error: the reader sets it aside (the
  quality log's ``entered in error``), so it is no contact. Last contact 2016-06-01, follow-up
  ends 2016-06-01 + 365 = 2017-06-01, 517 days after index (366 in 2016 to 2017-01-01,
  then 31 + 28 + 31 + 30 + 31 = 151).
- OB-202's observation of 2017-03-01 is final but its value cannot be read ("n/a"):
  the quality log sets the value aside (``value not numeric``), yet a dated row of a known
  patient is contact whatever its value, as a coded row is whatever its code. Last contact
  2017-03-01, follow-up ends 2018-03-01, 790 days after index (366 + 365 + 31 + 28).
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import polars as pl

from pipeline.workflows.build import BuildOptions, build_study

DIABETES = """\
condition: diabetes
title: Diabetes (test)
about: two E11 codes within two years
evidence:
  code: {diagnosis: {ICD10: [E11]}}
rules:
  - {name: two codes, need: {code: 2}, distinct_days: true, within_days: 730}
"""

STUDY = """\
study: contact_judged
title: contact from judged rows
extract: {extract}
definitions: {definitions}
end_of_data: 2019-12-31
index: {{first_encounter: {{between: [2015-01-01, 2016-12-31]}}}}
covariates:
  hba1c: {{latest: hba1c, window: [-730, 0]}}
outcomes:
  conditions: [diabetes]
  horizon_days: 1461
followup:
  end_at: [death, end_of_data, lost_contact, horizon]
  lost_contact_after_days: 365
  contact: any_activity
output:
  folder: {out}
"""

LOINC, UCUM = "http://loinc.org", "http://unitsofmeasure.org"


def _observation(oid: str, patient: str, day: str, status: str, value: dict) -> dict:
    return {
        "resourceType": "Observation",
        "id": oid,
        "status": status,
        "code": {"coding": [{"system": LOINC, "code": "4548-4"}]},
        "subject": {"reference": f"Patient/{patient}"},
        "effectiveDateTime": day,
        **value,
    }


def _export(folder: Path) -> Path:
    percent = {"valueQuantity": {"value": 6.5, "unit": "%", "system": UCUM, "code": "%"}}
    resources: dict[str, list[dict]] = {"Patient": [], "Encounter": [], "Observation": []}
    for pid in ("OB-201", "OB-202"):
        resources["Patient"].append(
            {"resourceType": "Patient", "id": pid, "gender": "female", "birthDate": "1950-04-12"}
        )
        resources["Encounter"].append(
            {
                "resourceType": "Encounter",
                "id": f"enc-{pid}",
                "status": "finished",
                "class": {
                    "system": "http://terminology.hl7.org/CodeSystem/v3-ActCode",
                    "code": "AMB",
                },
                "subject": {"reference": f"Patient/{pid}"},
                "period": {"start": "2016-01-01"},
            }
        )
        resources["Observation"].append(
            _observation(f"obs-{pid}-a", pid, "2016-06-01", "final", percent)
        )
    resources["Observation"] += [
        _observation("obs-OB-201-b", "OB-201", "2017-03-01", "entered-in-error", percent),
        _observation("obs-OB-202-b", "OB-202", "2017-03-01", "final", {"valueString": "n/a"}),
    ]
    folder.mkdir()
    for kind, items in resources.items():
        lines = "".join(json.dumps(r) + "\n" for r in items)
        (folder / f"{kind}.ndjson").write_text(lines, encoding="utf-8")
    return folder


def _build(tmp_path: Path) -> Path:
    extract = _export(tmp_path / "export")
    definitions = tmp_path / "conditions"
    definitions.mkdir()
    (definitions / "diabetes.yaml").write_text(DIABETES, encoding="utf-8")
    out = tmp_path / "out"
    study = tmp_path / "study.yaml"
    text = STUDY.format(extract=extract, definitions=definitions, out=out)
    study.write_text(text, encoding="utf-8")
    build_study(study, BuildOptions(out=out))
    return out


def test_a_row_the_reader_set_aside_is_no_contact_a_bad_value_is(tmp_path: Path) -> None:
    out = _build(tmp_path)
    cohort = pl.read_parquet(out / "cohort.parquet").sort("patient_id")
    ends = [
        (r["patient_id"], str(r["followup_end"]), r["followup_days"], r["end_reason"])
        for r in cohort.iter_rows(named=True)
    ]
    assert ends == [
        ("OB-201", "2017-06-01", 517, "lost_contact"),
        ("OB-202", "2018-03-01", 790, "lost_contact"),
    ]
    # Both later observations are set aside by the quality log, each for its own reason.
    with (out / "quality.csv").open(encoding="utf-8") as handle:
        measurements = {
            r["reason"]: int(r["n_rows"])
            for r in csv.DictReader(handle)
            if r["source_table"] == "measurements"
        }
    assert measurements["entered in error"] == 1
    assert measurements["value not numeric"] == 1
    assert measurements["used"] == 2
