"""A quote in a path, a site's column name or a site's value is data, never SQL.

Folders named like ``o'brien extract`` and columns named like ``Patient's ID`` reach the
engine as sqlglot literals and identifiers; pasting them into SQL would break the statement (or
worse). Each build is compared with the same data read from plain names.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import polars as pl
import pytest

from pipeline.workflows.build import BuildOptions, build_study

from .conftest import DEMO_STUDY, HANDMADE, ROOT
from .helpers import run_stage

TABLES = ("patients", "encounters", "diagnoses", "prescriptions", "measurements")
QUOTED_ID = "Patient's ID"
QUOTED_SEX = 'Sex "as recorded"'


@pytest.fixture(scope="module")
def plain_cohort(tmp_path_factory: pytest.TempPathFactory) -> pl.DataFrame:
    out = tmp_path_factory.mktemp("plain") / "out"
    result = build_study(DEMO_STUDY, BuildOptions(extract=HANDMADE, out=out))
    assert result.cohort_rows == 29  # tests/fixtures/handmade/README.md
    return pl.read_parquet(out / "cohort.parquet")


@pytest.mark.parametrize("file_format", ["csv", "parquet"])
def test_a_quote_in_the_extract_and_study_folders(
    tmp_path: Path, plain_cohort: pl.DataFrame, file_format: str
) -> None:
    extract = tmp_path / "o'brien extract"
    extract.mkdir()
    for table in TABLES:
        source = HANDMADE / f"{table}.csv"
        if file_format == "csv":
            shutil.copy(source, extract / source.name)
        else:
            frame = pl.read_csv(source, infer_schema_length=0)
            frame.write_parquet(extract / f"{table}.parquet")
    project = tmp_path / "o'brien study"
    shutil.copytree(ROOT / "definitions" / "conditions", project / "conditions")
    shutil.copytree(ROOT / "definitions" / "codelists", project / "codelists")
    (project / "studies").mkdir()
    study = project / "studies" / DEMO_STUDY.name
    text = DEMO_STUDY.read_text(encoding="utf-8")
    study.write_text(
        text.replace("extract: ../../synthetic_extract", 'extract: "../../o\'brien extract"'),
        encoding="utf-8",
    )
    out = tmp_path / "o'brien out"
    build_study(study, BuildOptions(out=out))
    assert pl.read_parquet(out / "cohort.parquet").equals(plain_cohort)


def _quoted_site(folder: Path) -> Path:
    """The hand-made extract with quoted column names and values, and its mapping file."""
    folder.mkdir()
    lines = ["mapping: quoted_site", "tables:"]
    for table in TABLES:
        frame = pl.read_csv(HANDMADE / f"{table}.csv", infer_schema_length=0)
        renames = {"patient_id": QUOTED_ID}
        if table == "patients":
            renames["sex"] = QUOTED_SEX
            frame = frame.with_columns(pl.col("sex").replace({"F": "F'", "M": "M'"}))
        frame = frame.rename(renames)
        name = f"{table} o'site.csv"
        frame.write_csv(folder / name)
        columns = {c: c for c in frame.columns}
        columns = {next((k for k, v in renames.items() if v == c), c): c for c in columns}
        lines += [
            f"  {table}:",
            f"    file: {_yaml_string(name)}",
            "    columns: {"
            + ", ".join(f"{k}: {_yaml_string(v)}" for k, v in columns.items())
            + "}",
        ]
        if table == "patients":
            lines.append('    values: {sex: {"F\'": F, "M\'": M}}')
    mapping = folder / "mapping.yaml"
    mapping.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return mapping


def _yaml_string(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


def test_a_quote_in_mapped_column_names_file_names_and_values(
    tmp_path: Path, plain_cohort: pl.DataFrame
) -> None:
    mapping = _quoted_site(tmp_path / "site")
    assert QUOTED_ID in (tmp_path / "site" / "patients o'site.csv").read_text(encoding="utf-8")
    assert run_stage(mapping, "patient_base") == run_stage(HANDMADE, "patient_base")
    out = tmp_path / "out"
    build_study(DEMO_STUDY, BuildOptions(extract=mapping, out=out))
    assert pl.read_parquet(out / "cohort.parquet").equals(plain_cohort)
