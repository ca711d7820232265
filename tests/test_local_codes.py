"""Local product and lab test codes through the study's ``local_codes:`` tables.

A hand-made extract in tmp_path, built for real: four patients with prescriptions written as
local product codes (or ATC) and measurements written as local lab codes (or the measure's
name). The expected cohort was worked out by hand from the tables below:

- P1: product RX-77 (-> A10AB01, an insulin) on 2017-05-01; lab LAB-A1C (-> LOINC 4548-4,
  which the shipped hba1c measure lists) 7.1 % on 2017-06-01. Incident on both.
- P2: product RX-99 (-> C03CA01, furosemide, no insulin); lab GLYC (-> measure hba1c) 5.2 %.
  Incident on neither.
- P3: product ZZ-1, in no table and no ATC code: set aside as a malformed code; HbA1c by
  name 6.8 % on 2017-02-01. Incident on high_a1c only.
- P4: ATC A10AE04 written as ATC (2018-01-15); lab "lab-a1c" (local codes keep their case, so
  not LAB-A1C) 9.0 %: an unknown measure. Incident on insulin only.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import polars as pl
from typer.testing import CliRunner

from pipeline.cli import app

from .helpers import eligible_encounters, eligible_patient, write_extract, write_study

INSULIN = """\
condition: on_insulin
title: On insulin
about: One insulin prescription. Fictional, for a test.
evidence:
  insulin: {prescription: {atc: [A10A]}}
rules:
  - {name: one prescription, need: {insulin: 1}}
"""

HIGH_A1C = """\
condition: high_a1c
title: High HbA1c
about: One HbA1c of at least 6.5 %. Fictional, for a test.
evidence:
  a1c: {measurement: {measure: hba1c, at_least: 6.5 %}}
rules:
  - {name: one value, need: {a1c: 1}}
"""

PRODUCTS = "local_code,atc,product\nRX-77,A10AB01,Insulin vial\nRX-99,C03CA01,Furosemide tab\n"
LAB_TESTS = "local_code,loinc,measure\nLAB-A1C,4548-4,\nGLYC,,hba1c\n"


def _extract(folder: Path) -> Path:
    ids = ("P1", "P2", "P3", "P4")
    rx = [("P1", "RX-77", "2017-05-01"), ("P2", "RX-99", "2017-05-01")]
    rx += [("P3", "ZZ-1", "2017-05-01"), ("P4", "A10AE04", "2018-01-15")]
    labs = [("P1", "LAB-A1C", "7.1", "2017-06-01"), ("P2", "GLYC", "5.2", "2017-06-01")]
    labs += [("P3", "hba1c", "6.8", "2017-02-01"), ("P4", "lab-a1c", "9.0", "2017-06-01")]
    return write_extract(
        folder,
        {
            "patients": [eligible_patient(p) for p in ids],
            "encounters": [e for p in ids for e in eligible_encounters(p)],
            "prescriptions": [
                {"patient_id": p, "start_date": d, "stop_date": d, "atc": code} for p, code, d in rx
            ],
            "measurements": [
                {"patient_id": p, "obs_date": d, "measure": m, "value": v, "unit": "%"}
                for p, m, v, d in labs
            ],
        },
    )


def _study(tmp_path: Path, products: str = PRODUCTS, lab_tests: str = LAB_TESTS) -> Path:
    study = write_study(
        tmp_path,
        {"on_insulin": INSULIN, "high_a1c": HIGH_A1C},
        ["on_insulin", "high_a1c"],
        extract=_extract(tmp_path / "extract"),
    )
    local = tmp_path / "local"
    local.mkdir()
    (local / "products_atc.csv").write_text(products, encoding="utf-8")
    (local / "lab_tests.csv").write_text(lab_tests, encoding="utf-8")
    text = study.read_text(encoding="utf-8")
    study.write_text(
        text.replace(
            "end_of_data:",
            "local_codes:\n  products: local/products_atc.csv\n  lab_tests: local/lab_tests.csv\n"
            "end_of_data:",
        ),
        encoding="utf-8",
    )
    return study


def _build(study: Path, *args: str) -> tuple[int, str]:
    result = CliRunner().invoke(app, ["build", str(study), *args])
    return result.exit_code, result.output


def test_local_codes_are_judged_as_the_atc_code_and_measure_they_stand_for(
    tmp_path: Path,
) -> None:
    code, output = _build(_study(tmp_path))
    assert code == 0, output
    cohort = pl.read_parquet(tmp_path / "out" / "cohort.parquet").sort("patient_id")
    got = {
        row["patient_id"]: (row["incident_on_insulin"], row["incident_high_a1c"])
        for row in cohort.iter_rows(named=True)
    }
    assert got == {
        "P1": (True, True),
        "P2": (False, False),
        "P3": (False, True),
        "P4": (True, False),
    }
    onsets = dict(zip(cohort["patient_id"], cohort["onset_on_insulin"], strict=True))
    assert str(onsets["P1"]) == "2017-05-01"
    with (tmp_path / "out" / "quality.csv").open(encoding="utf-8") as handle:
        quality = {(r["source_table"], r["reason"]): r["n_rows"] for r in csv.DictReader(handle)}
    assert quality[("prescriptions", "malformed code")] == "1"  # P3's ZZ-1
    assert quality[("measurements", "unknown measure")] == "1"  # P4's lab-a1c


def test_without_the_tables_the_local_codes_count_for_nothing(tmp_path: Path) -> None:
    study = _study(tmp_path)
    text = study.read_text(encoding="utf-8")
    start = text.index("local_codes:")
    text = text[:start] + text[text.index("end_of_data:") :]
    study.write_text(text, encoding="utf-8")
    code, output = _build(study)
    assert code == 2, output  # three of four prescriptions are then malformed codes
    assert 'prescriptions: 3 of 4 rows (75 %) set aside as "malformed code"' in output
    accept = "quality:\n  accept_set_aside: [{table: prescriptions, reason: malformed code}]\n"
    study.write_text(text.replace("end_of_data:", accept + "end_of_data:"), encoding="utf-8")
    code, output = _build(study)
    assert code == 0, output
    cohort = pl.read_parquet(tmp_path / "out" / "cohort.parquet").sort("patient_id")
    assert cohort["incident_on_insulin"].to_list() == [False, False, False, True]
    assert cohort["incident_high_a1c"].to_list() == [False, False, True, False]


def test_the_tables_are_hashed_in_the_manifest_and_verify_sees_a_change(tmp_path: Path) -> None:
    study = _study(tmp_path)
    assert _build(study)[0] == 0
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text(encoding="utf-8"))
    paths = {e["path"] for e in manifest["definitions"]}
    assert {"local/products_atc.csv", "local/lab_tests.csv"} <= paths
    assert "local_codes.products" not in manifest["study_keys"]
    (tmp_path / "local" / "products_atc.csv").write_text(
        PRODUCTS.replace("A10AB01", "A10AB05"), encoding="utf-8"
    )
    result = CliRunner().invoke(app, ["verify", str(tmp_path / "out")])
    assert result.exit_code != 0
    assert "local/products_atc.csv has changed since the build" in result.output


def test_bad_rows_of_the_product_table_stop_the_build_at_their_lines(tmp_path: Path) -> None:
    products = PRODUCTS + "RX-5,A10X9,Bad code\n,A10AB01,No local code\nRX-77,A10AE04,Again\n"
    code, output = _build(_study(tmp_path, products=products))
    assert code == 2, output
    for line, problem in ((4, "code-shape"), (5, "bad-row"), (6, "duplicate-code")):
        assert f"products_atc.csv:{line}" in output
        assert f"[{problem}]" in output
    assert not (tmp_path / "out").exists()


def test_bad_rows_of_the_lab_table_stop_the_build_at_their_lines(tmp_path: Path) -> None:
    # 1234-5 is a made-up LOINC code no shipped measure lists; 4548-4 is hba1c's (loinc.org).
    lab_tests = LAB_TESTS + "X1,1234-5,\nX2,,urate_made_up\nX3,4548-4,hba1c\nX4,45484,\n"
    code, output = _build(_study(tmp_path, lab_tests=lab_tests))
    assert code == 2, output
    for line, problem in ((4, "unknown-code"), (5, "unknown-measure"), (6, "bad-row")):
        assert f"lab_tests.csv:{line}" in output
        assert f"[{problem}]" in output
    assert "lab_tests.csv:7" in output
    assert not (tmp_path / "out").exists()


def test_a_missing_table_is_named_at_the_study_line(tmp_path: Path) -> None:
    study = _study(tmp_path)
    (tmp_path / "local" / "lab_tests.csv").unlink()
    code, output = _build(study)
    assert code == 2, output
    assert "study.yaml:" in output
    assert "[unreadable]" in output


def test_the_code_audit_shows_the_local_code_and_its_atc_code(tmp_path: Path) -> None:
    study = _study(tmp_path)
    audit = tmp_path / "audit"
    result = CliRunner().invoke(app, ["codes", str(study), "--out", str(audit)])
    assert result.exit_code == 0, result.output
    with (audit / "codes_matched.csv").open(encoding="utf-8") as handle:
        rows = list(csv.reader(handle))
    assert ["on_insulin", "insulin", "ATC", "(inline)", "A10A", "RX-77", "A10AB01"] in [
        r[:7] for r in rows
    ]
