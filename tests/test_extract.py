"""The extract is checked before any work: missing tables and columns are named."""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import polars as pl
import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.errors import EngineError, ExtractError
from pipeline.workflows.build import BuildOptions, build_study

from .conftest import DEMO_STUDY, HANDMADE


@pytest.fixture
def extract(tmp_path: Path) -> Path:
    folder = tmp_path / "extract"
    shutil.copytree(HANDMADE, folder, ignore=shutil.ignore_patterns("expected_*", "*.md"))
    return folder


def _build(extract: Path, out: Path) -> None:
    build_study(DEMO_STUDY, BuildOptions(extract=extract, out=out))


def test_missing_table_is_named(extract: Path, tmp_path: Path) -> None:
    (extract / "prescriptions.csv").unlink()
    with pytest.raises(ExtractError) as caught:
        _build(extract, tmp_path / "out")
    assert str(caught.value) == (
        f"{extract} [missing-table] table 'prescriptions' not found "
        "(looked for prescriptions.csv, prescriptions.parquet, prescriptions/*.parquet)"
    )
    assert (caught.value.code, caught.value.where) == ("missing-table", str(extract))
    assert not (tmp_path / "out").exists()


def test_missing_column_is_named(extract: Path, tmp_path: Path) -> None:
    path = extract / "diagnoses.csv"
    text = path.read_text(encoding="utf-8")
    path.write_text(text.replace("code_system,", "codesystem,", 1), encoding="utf-8")
    with pytest.raises(ExtractError) as caught:
        _build(extract, tmp_path / "out")
    message = str(caught.value)
    assert message.startswith(
        f"{path} [missing-column] table 'diagnoses' lacks column(s) code_system; found: "
    )
    assert (caught.value.code, caught.value.where) == ("missing-column", str(path))
    assert "codesystem" in message


def test_birth_date_or_year_is_required(extract: Path, tmp_path: Path) -> None:
    path = extract / "patients.csv"
    frame = pl.read_csv(path, infer_schema_length=0).drop("birth_date", "birth_year")
    frame.write_csv(path)
    with pytest.raises(ExtractError, match="lacks column\\(s\\) birth_date or birth_year"):
        _build(extract, tmp_path / "out")


def test_ambiguous_table(extract: Path, tmp_path: Path) -> None:
    pl.read_csv(extract / "encounters.csv", infer_schema_length=0).write_parquet(
        extract / "encounters.parquet"
    )
    with pytest.raises(ExtractError, match="table 'encounters' is ambiguous"):
        _build(extract, tmp_path / "out")


def test_cli_extract_error_exits_2(extract: Path, tmp_path: Path) -> None:
    (extract / "encounters.csv").unlink()
    out = tmp_path / "out"
    result = CliRunner().invoke(
        app, ["build", str(DEMO_STUDY), "--extract", str(extract), "--out", str(out)]
    )
    assert result.exit_code == 2
    assert "table 'encounters' not found" in result.output
    assert not out.exists()


def test_conflicting_patient_rows_fail_the_build(extract: Path, tmp_path: Path) -> None:
    path = extract / "patients.csv"
    lines = path.read_text(encoding="utf-8").splitlines()
    conflicting = lines[1].split(",")
    conflicting[3] = "F" if conflicting[3] != "F" else "M"
    path.write_text("\n".join([*lines, ",".join(conflicting)]) + "\n", encoding="utf-8")
    with pytest.raises(EngineError, match="lists the same patient_id with different values"):
        _build(extract, tmp_path / "out")
    assert not (tmp_path / "out").exists()


def test_parquet_extract_gives_the_same_cohort(extract: Path, tmp_path: Path) -> None:
    for csv_file in sorted(extract.glob("*.csv")):
        frame = pl.read_csv(csv_file, infer_schema_length=0)
        for column in frame.columns:
            if column.endswith("_date"):
                frame = frame.with_columns(pl.col(column).str.to_date(strict=False))
        frame.write_parquet(csv_file.with_suffix(".parquet"))
        csv_file.unlink()
    _build(extract, tmp_path / "from_parquet")
    _build(HANDMADE, tmp_path / "from_csv")
    from_parquet = pl.read_parquet(tmp_path / "from_parquet" / "cohort.parquet")
    from_csv = pl.read_parquet(tmp_path / "from_csv" / "cohort.parquet")
    assert from_parquet.height == 29
    assert from_parquet.equals(from_csv)


def test_integer_patient_ids_keep_integer_order(extract: Path, tmp_path: Path) -> None:
    for csv_file in extract.glob("*.csv"):
        text = csv_file.read_text(encoding="utf-8")
        csv_file.write_text(re.sub(r"HM-0*(\d+)", r"\1", text), encoding="utf-8")
    _build(extract, tmp_path / "out")
    cohort = pl.read_parquet(tmp_path / "out" / "cohort.parquet")
    assert cohort.schema["patient_id"] == pl.Int64
    ids = cohort["patient_id"].to_list()
    assert ids == sorted(ids)
    # 9 sorts before 10 as an integer, not after it as text would
    assert ids.index(9) < ids.index(10)


def test_leading_zero_ids_stay_text(extract: Path, tmp_path: Path) -> None:
    for csv_file in extract.glob("*.csv"):
        text = csv_file.read_text(encoding="utf-8")
        csv_file.write_text(text.replace("HM-", "00"), encoding="utf-8")
    _build(extract, tmp_path / "out")
    cohort = pl.read_parquet(tmp_path / "out" / "cohort.parquet")
    assert cohort.schema["patient_id"] == pl.String
    assert cohort["patient_id"][0].startswith("00")


def test_a_bad_value_in_a_numeric_looking_csv_column_is_read(tmp_path: Path) -> None:
    # DuckDB 2.0 would push TRY_CAST into the CSV reader as a strict cast and fail the read;
    # the engine turns that optimisation off so the row reaches the quality log instead.
    extract = tmp_path / "x"
    shutil.copytree(HANDMADE, extract, ignore=shutil.ignore_patterns("expected_*", "*.md"))
    (extract / "measurements.csv").write_text(
        "patient_id,obs_date,measure,value_text,value,unit\n"
        "HM-001,2015-06-01,hba1c,,6.1,%\nHM-001,2015-07-01,hba1c,,x,%\n",
        encoding="utf-8",
    )
    result = build_study(DEMO_STUDY, BuildOptions(extract=extract, out=tmp_path / "out"))
    reasons = {
        (r["source_table"], r["reason"]): r["n_rows"]
        for r in result.run.outputs["quality"].to_pylist()
    }
    assert reasons[("measurements", "value not numeric")] == 1
    assert reasons[("measurements", "used")] == 1


def test_a_folder_of_parquet_parts_gives_the_same_cohort(tmp_path: Path) -> None:
    # Large extracts arrive as many Parquet parts per table: <table>/*.parquet.
    extract = tmp_path / "parts"
    extract.mkdir()
    for csv_file in sorted(HANDMADE.glob("*.csv")):
        if csv_file.name.startswith("expected_"):
            continue
        frame = pl.read_csv(csv_file, infer_schema_length=0)
        folder = extract / csv_file.stem
        folder.mkdir()
        for number, start in enumerate(range(0, max(frame.height, 1), 7)):
            frame.slice(start, 7).write_parquet(folder / f"part-{number:03d}.parquet")
    _build(extract, tmp_path / "from_parts")
    _build(HANDMADE, tmp_path / "from_csv")
    parts = pl.read_parquet(tmp_path / "from_parts" / "cohort.parquet")
    assert parts.height == 29
    assert parts.equals(pl.read_parquet(tmp_path / "from_csv" / "cohort.parquet"))
