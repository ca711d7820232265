"""End to end: the demo study on hand-made extracts whose expected tables were written by hand.

Each fixture's README.md explains every patient's boundary case and the arithmetic:
``handmade`` covers index, eligibility, follow-up and code rules; ``handmade_measures`` covers
measurement evidence (HbA1c, eGFR reported and derived) and the hypertension baseline flag.
"""

from __future__ import annotations

import csv
from pathlib import Path

import polars as pl
import pytest
from typer.testing import CliRunner

from pipeline.cli import app

from .conftest import DEMO_STUDY, HANDMADE

FIXTURES = [HANDMADE, HANDMADE.parent / "handmade_measures"]


@pytest.fixture(scope="module", params=FIXTURES, ids=lambda p: p.name)
def extract_dir(request: pytest.FixtureRequest) -> Path:
    return request.param


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory, extract_dir: Path) -> Path:
    out = tmp_path_factory.mktemp(extract_dir.name) / "out"
    result = CliRunner().invoke(
        app, ["build", str(DEMO_STUDY), "--extract", str(extract_dir), "--out", str(out), "--quiet"]
    )
    assert result.exit_code == 0, result.output
    return out


def _as_text(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    return str(value)


def test_output_files(built: Path) -> None:
    assert sorted(p.name for p in built.iterdir()) == [
        "attrition.csv",
        "cohort.parquet",
        "dictionary.csv",
        "dictionary.md",
        "manifest.json",
        "population.parquet",
        "quality.csv",
        "run.json",
    ]


def test_cohort_equals_hand_computed_table(built: Path, extract_dir: Path) -> None:
    got = pl.read_parquet(built / "cohort.parquet")
    with (extract_dir / "expected_cohort.csv").open(encoding="utf-8") as handle:
        expected = list(csv.DictReader(handle))
    assert got["patient_id"].to_list() == [row["patient_id"] for row in expected]
    columns = list(expected[0].keys())
    for got_row, want in zip(got.select(columns).iter_rows(named=True), expected, strict=True):
        assert {c: _as_text(v) for c, v in got_row.items()} == want


def test_attrition_equals_hand_computed_counts(built: Path, extract_dir: Path) -> None:
    with (built / "attrition.csv").open(encoding="utf-8") as handle:
        got = [
            {k: row[k] for k in ("step", "patients_before", "removed", "remaining")}
            for row in csv.DictReader(handle)
        ]
    with (extract_dir / "expected_attrition.csv").open(encoding="utf-8") as handle:
        expected = list(csv.DictReader(handle))
    assert got == expected


def test_cohort_column_types(built: Path) -> None:
    schema = pl.read_parquet_schema(built / "cohort.parquet")
    assert schema["patient_id"] == pl.String
    assert schema["index_date"] == pl.Date
    assert schema["age_at_index"] == pl.Int32
    assert schema["incident_ckd"] == pl.Boolean
    assert schema["days_to_ckd"] == pl.Int32
    assert schema["followup_end"] == pl.Date
    assert list(schema)[-3:] == ["followup_end", "followup_days", "end_reason"]


def test_rebuild_is_byte_identical(built: Path, extract_dir: Path, tmp_path: Path) -> None:
    out = tmp_path / "again"
    result = CliRunner().invoke(
        app,
        [
            "build",
            str(DEMO_STUDY),
            "--extract",
            str(extract_dir),
            "--out",
            str(out),
            "--quiet",
            "--threads",
            "1",
        ],
    )
    assert result.exit_code == 0, result.output
    for name in ("cohort.parquet", "attrition.csv"):
        assert (out / name).read_bytes() == (built / name).read_bytes(), name
