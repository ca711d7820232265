"""``ascertain profile`` on a tiny extract whose numbers are known."""

from __future__ import annotations

import json
from html import escape
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.errors import AscertainError, ExtractError
from pipeline.workflows.profile import PATIENT_LEVEL, profile_extract

from .helpers import write_extract


@pytest.fixture
def extract(tmp_path: Path) -> Path:
    dx = {"patient_id": "A", "event_date": "2015-01-01", "code_system": "ICD10", "code": "I10"}
    mx = {"patient_id": "A", "obs_date": "2016-01-01", "measure": "sbp", "unit": "mmHg"}
    return write_extract(
        tmp_path / "x",
        {
            "patients": [{"patient_id": "A", "birth_date": "1950-01-01", "sex": "F"}],
            "encounters": [
                {"patient_id": "A", "encounter_date": "2015-01-01"},
                {"patient_id": "A", "encounter_date": "2016-05-05"},
                {"patient_id": "Z", "encounter_date": "2016-05-05"},  # orphan
                {"patient_id": "A", "encounter_date": "2016-02-30"},  # unreadable
            ],
            "diagnoses": [dx, dx | {"code": "i1.0"}, dx | {"code": "E11.9"}],
            "measurements": [mx | {"value": v} for v in ("120", "130", "140", "150", "x")],
        },
    )


def test_counts_dates_orphans(extract: Path) -> None:
    profile = profile_extract(extract)
    encounters = profile["tables"]["encounters"]
    assert encounters["rows"] == 4
    assert encounters["unreadable_dates"] == 1
    assert encounters["orphan_rows"] == 1
    assert str(encounters["first_date"]) == "2015-01-01"
    assert encounters["rows_per_year"] == {"2015": 1, "2016": 2}
    assert profile["missing_tables"] == []


def test_codes_and_measures(extract: Path) -> None:
    profile = profile_extract(extract)
    # codes are normalised as in a build: 'I10' and 'i1.0' are the same code
    assert profile["diagnosis_codes"] == [
        {"code_system": "ICD10", "code": "I10", "rows": 2},
        {"code_system": "ICD10", "code": "E119", "rows": 1},
    ]
    (sbp,) = profile["measures"]
    assert (sbp["measure"], sbp["unit"], sbp["rows"], sbp["numeric"]) == ("sbp", "mmHg", 5, 4)


def test_measure_values_are_percentiles_of_enough_values(extract: Path) -> None:
    # 4 numeric values (120, 130, 140, 150): below the default threshold of 5, no percentile
    (sbp,) = profile_extract(extract)["measures"]
    assert [sbp[f"p{p}"] for p in (5, 25, 50, 75, 95)] == [None] * 5
    # with 4 allowed: linear interpolation at (n - 1) * q, by hand: 0.15 -> 121.5, 2.85 -> 148.5
    (sbp,) = profile_extract(extract, threshold=4)["measures"]
    assert [sbp[f"p{p}"] for p in (5, 25, 50, 75, 95)] == [121.5, 127.5, 135.0, 142.5, 148.5]
    # never the smallest or largest value: those are single patients' values
    assert not {"min", "max"} & set(sbp)
    values = {v for k, v in sbp.items() if k not in ("measure", "unit", "rows", "numeric")}
    assert not {120.0, 150.0} & values


def test_cli_writes_json_and_html(extract: Path, tmp_path: Path) -> None:
    out = tmp_path / "profile"
    result = CliRunner().invoke(app, ["profile", str(extract), "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert json.loads((out / "profile.json").read_text())["tables"]["patients"]["rows"] == 1
    page = (out / "profile.html").read_text()
    assert "<svg" in page
    assert "http" not in page
    # it shows small counts, so it says it is patient-level detail, and nowhere "counts only"
    assert PATIENT_LEVEL in " ".join(result.output.split())
    assert escape(PATIENT_LEVEL) in page
    assert "counts only" not in page
    assert json.loads((out / "profile.json").read_text())["release"] == PATIENT_LEVEL


def test_cli_threshold_must_be_positive(extract: Path, tmp_path: Path) -> None:
    result = CliRunner().invoke(app, ["profile", str(extract), "--threshold", "0"])
    assert result.exit_code == 2
    with pytest.raises(AscertainError, match="at least 1"):
        profile_extract(extract, threshold=0)


def test_missing_patients_table(tmp_path: Path) -> None:
    (tmp_path / "empty").mkdir()
    with pytest.raises(ExtractError, match="table 'patients' not found"):
        profile_extract(tmp_path / "empty")
