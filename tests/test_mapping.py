"""Site mapping files: two differently shaped fictional sites read into the same tables."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import polars as pl
import pytest

from pipeline.errors import ConfigError
from pipeline.extract import discover_extract
from pipeline.extract.schema import DATE_COLUMNS
from pipeline.workflows.build import BuildOptions, build_study, plan_study

from .conftest import DEMO_STUDY, HANDMADE
from .helpers import run_stage

RENAMES = {
    "patients": ("people", {"patient_id": "PersonID", "birth_date": "DOB", "birth_year": "Born",
                            "sex": "Gender", "death_date": "Died", "practice_id": "Surgery"}),
    "encounters": ("contacts", {"patient_id": "PersonID", "encounter_date": "Seen",
                                "encounter_type": "Kind"}),
    "diagnoses": ("problems", {"patient_id": "PersonID", "event_date": "Recorded",
                               "code_system": "Scheme", "code": "Code", "source": "Origin"}),
    "prescriptions": ("meds", {"patient_id": "PersonID", "start_date": "Started",
                               "stop_date": "Stopped", "atc": "ATC Code", "drug_text": "Name"}),
    "measurements": ("labs", {"patient_id": "PersonID", "obs_date": "Taken", "measure": "Test",
                              "value_text": "Result Text", "value": "Result", "unit": "Units"}),
}  # fmt: skip
DATES = DATE_COLUMNS
SEX = {"F": "2", "M": "1"}
SYSTEM = {"ICD10": "ICD-10-CA", "ICD9": "9"}


def _site(folder: Path, *, dates: str, parquet: bool) -> Path:
    """Rewrite the hand-made extract as a site would deliver it, plus its mapping file."""
    folder.mkdir()
    lines = ["mapping: site_" + folder.name, "tables:"]
    for table, (file, columns) in RENAMES.items():
        frame = pl.read_csv(HANDMADE / f"{table}.csv", infer_schema_length=0)
        for canonical in frame.columns:
            column = pl.col(canonical)
            if canonical in DATES:
                day = column.str.to_date("%Y-%m-%d", strict=False)
                if dates == "excel":
                    column = (day - pl.lit(dt.date(1899, 12, 30))).dt.total_days().cast(pl.String)
                else:
                    column = day.dt.strftime("%d/%m/%Y")
            elif canonical == "sex":
                column = column.replace(SEX)
            elif canonical == "code_system":
                column = column.replace(SYSTEM)
            frame = frame.with_columns(column.alias(canonical))
        frame = frame.rename(columns)
        name = f"{file}.parquet" if parquet else f"{file}.csv"
        if parquet:
            frame.write_parquet(folder / name)
        else:
            frame.write_csv(folder / name)
        mapped = ", ".join(f"{k}: '{v}'" for k, v in columns.items())
        lines += [
            f"  {table}:",
            f"    file: {name}",
            f"    columns: {{{mapped}}}",
            f"    dates: '{'excel' if dates == 'excel' else '%d/%m/%Y'}'",
        ]
        if table == "patients":
            lines.append("    values: {sex: {'1': M, '2': F}}")
        if table == "diagnoses":
            lines.append("    values: {code_system: {ICD-10-CA: ICD10, '9': ICD9}}")
    mapping = folder / "mapping.yaml"
    mapping.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return mapping


@pytest.fixture(scope="module")
def sites(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    base = tmp_path_factory.mktemp("sites")
    return (
        _site(base / "north", dates="dmy", parquet=False),
        _site(base / "south", dates="excel", parquet=True),
    )


@pytest.mark.parametrize(
    "stage", ["patient_base", "encounter_summary", "coded_evidence_days", "measurement_values"]
)
def test_both_sites_give_the_canonical_tables(sites: tuple[Path, Path], stage: str) -> None:
    order = (
        ("patient_id",)
        if stage in ("patient_base", "encounter_summary")
        else (
            "patient_id",
            "evidence" if stage == "coded_evidence_days" else "measure",
            "event_date" if stage == "coded_evidence_days" else "obs_date",
        )
    )
    canonical = run_stage(HANDMADE, stage, order=order)
    for mapping in sites:
        assert run_stage(mapping, stage, order=order) == canonical, mapping.parent.name


def test_cohorts_match(sites: tuple[Path, Path], tmp_path: Path) -> None:
    expected = build_study(DEMO_STUDY, BuildOptions(extract=HANDMADE, out=tmp_path / "c"))
    for mapping in sites:
        got = build_study(
            DEMO_STUDY, BuildOptions(extract=mapping, out=tmp_path / mapping.parent.name)
        )
        assert got.read("cohort").equals(expected.read("cohort"))
        assert got.run.outputs["rows_read"].equals(expected.run.outputs["rows_read"])


def test_mapping_errors_point_at_the_line(sites: tuple[Path, Path], tmp_path: Path) -> None:
    mapping = sites[0]
    text = mapping.read_text(encoding="utf-8")
    bad = tmp_path / "mapping.yaml"
    for name in ("people.csv", "contacts.csv", "problems.csv", "meds.csv", "labs.csv"):
        (tmp_path / name).write_bytes((mapping.parent / name).read_bytes())
    bad.write_text(text.replace("Gender", "Sex").replace("birth_year:", "birth_yeer:"), "utf-8")
    plan_sources = plan_study(DEMO_STUDY)
    with pytest.raises(ConfigError) as caught:
        discover_extract(bad, plan_sources.sources)
    problems = [str(p).replace(f"{bad}:", "") for p in caught.value.problems]
    assert problems == [
        "5:58 [unknown-column] 'birth_yeer' is not a column of patients; did you mean "
        "'birth_year'?",
    ]
    bad.write_text(text.replace("Gender", "Sex"), "utf-8")
    with pytest.raises(ConfigError) as caught:
        discover_extract(bad, plan_sources.sources)
    (problem,) = caught.value.problems
    assert problem.code == "missing-column"
    assert "column 'Sex' is not in people.csv" in problem.message
    assert problem.line == 5
