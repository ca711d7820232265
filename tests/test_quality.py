"""The quality log accounts for every row: used, or set aside under the first reason found."""

from __future__ import annotations

import csv
import shutil
from pathlib import Path

import pytest

from pipeline.errors import EngineError
from pipeline.outputs._quality_log import check_row_accounting
from pipeline.workflows.build import BuildOptions, build_study

from .conftest import DEMO_STUDY, HANDMADE
from .helpers import demo_study_variant, write_extract

P = {"patient_id": "A"}
D = "2015-06-01"


@pytest.fixture(scope="module")
def quality(tmp_path_factory: pytest.TempPathFactory) -> dict[tuple[str, str], int]:
    folder = tmp_path_factory.mktemp("quality")
    dx = {**P, "event_date": D, "code_system": "ICD10", "code": "I50.9", "source": "billing"}
    rx = {**P, "start_date": D, "atc": "C03CA01"}
    mx = {**P, "obs_date": D, "measure": "hba1c", "value": "6.0", "unit": "%"}
    extract = write_extract(
        folder / "extract",  # the output goes beside it: an output inside the extract is refused
        {
            "patients": [
                {
                    "patient_id": "A",
                    "birth_date": "1950-01-01",
                    "sex": "F",
                    "death_date": "2018-01-01",
                },
                {"patient_id": "B", "birth_date": "1951-01-01", "sex": "M"},
                {"patient_id": "B", "birth_date": "1951-01-01", "sex": "M"},  # exact duplicate
                {"patient_id": "", "birth_date": "1951-01-01", "sex": "M"},  # no patient_id
            ],
            "encounters": [
                {**P, "encounter_date": D},
                {**P, "encounter_date": D},  # exact duplicate
                {**P, "encounter_date": "2015-02-30"},  # unparseable
                {**P, "encounter_date": "2018-01-02"},  # after death
                {"patient_id": "Z", "encounter_date": D},  # orphan
            ],
            "diagnoses": [
                dx,
                dx,  # exact duplicate
                dx | {"code_system": "ICD-10"},  # unknown code system
                dx | {"code": "I50.9'; DROP TABLE x"},  # malformed code
                dx | {"code_system": "ICD9", "code": "I50.9"},  # ICD-10 shape labelled ICD9
                dx | {"event_date": "2020-01-01"},  # after end of data (2019-12-31)
                dx | {"event_date": "31/12/2015"},  # unparseable
                dx | {"patient_id": "Z"},  # orphan
            ],
            "prescriptions": [rx, rx | {"atc": "C3CA01"}, rx | {"start_date": "2018-06-01"}],
            "measurements": [
                mx,
                mx | {"value": "", "value_text": "high"},  # value not numeric
                mx | {"unit": "mg"},  # unit not convertible
                mx | {"value": "45"},  # implausible for %
                mx | {"value": "", "value_text": ""},  # no value
                mx | {"measure": "hdl"},  # unknown measure
                mx | {"obs_date": "2018-02-01"},  # after death
            ],
        },
    )
    # Patient A has too little history for the demo study: the cohort is empty on purpose.
    study = demo_study_variant(folder / "study", output="allow_empty_cohort: true")
    build_study(study, BuildOptions(extract=extract, out=folder / "out"))
    with (folder / "out" / "quality.csv").open(encoding="utf-8") as handle:
        return {(r["source_table"], r["reason"]): int(r["n_rows"]) for r in csv.DictReader(handle)}


def test_every_reason_is_counted(quality: dict[tuple[str, str], int]) -> None:
    assert quality == {
        ("patients", "used"): 2,
        ("patients", "exact duplicate"): 1,
        ("patients", "missing patient_id"): 1,
        ("encounters", "used"): 1,
        ("encounters", "exact duplicate"): 1,
        ("encounters", "unparseable date"): 1,
        ("encounters", "after death"): 1,
        ("encounters", "orphan patient"): 1,
        ("diagnoses", "used"): 1,
        ("diagnoses", "exact duplicate"): 1,
        ("diagnoses", "unknown code system"): 1,
        ("diagnoses", "malformed code"): 2,
        ("diagnoses", "after end of data"): 1,
        ("diagnoses", "unparseable date"): 1,
        ("diagnoses", "orphan patient"): 1,
        ("prescriptions", "used"): 1,
        ("prescriptions", "malformed code"): 1,
        ("prescriptions", "after death"): 1,
        ("measurements", "used"): 1,
        ("measurements", "value not numeric"): 1,
        ("measurements", "unit not convertible"): 1,
        ("measurements", "implausible value"): 1,
        ("measurements", "no value"): 1,
        ("measurements", "unknown measure"): 1,
        ("measurements", "after death"): 1,
    }


def test_rows_add_up_on_the_demo_extract(tmp_path: Path) -> None:
    result = build_study(DEMO_STUDY, BuildOptions(out=tmp_path / "out"))
    with (tmp_path / "out" / "quality.csv").open(encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    read = {r["source_table"]: r["n_rows"] for r in result.run.outputs["rows_read"].to_pylist()}
    for table, n in read.items():
        assert sum(int(r["n_rows"]) for r in rows if r["source_table"] == table) == n
    # the synthetic extract carries every kind of mess at stated rates
    reasons = {(r["source_table"], r["reason"]) for r in rows}
    assert ("diagnoses", "exact duplicate") in reasons
    assert ("encounters", "orphan patient") in reasons
    assert ("measurements", "implausible value") in reasons


def test_a_mismatch_is_an_error(tmp_path: Path) -> None:
    extract = tmp_path / "x"
    shutil.copytree(HANDMADE, extract)
    result = build_study(DEMO_STUDY, BuildOptions(extract=extract, out=tmp_path / "out"))
    quality, read = result.run.outputs["quality"], result.run.outputs["rows_read"]
    assert check_row_accounting(quality, read)["diagnoses"]["read"] > 0
    with pytest.raises(EngineError, match="row accounting failed for diagnoses"):
        check_row_accounting(quality.slice(1), read)
