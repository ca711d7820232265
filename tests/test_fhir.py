"""FHIR R4 bulk-data export (NDJSON) read as the canonical extract.

``tests/fixtures/fhir`` holds eight fictional Orvane Bay patients (plus resources that point at
an orphan id, OB-099) written by hand as FHIR resources; ``tests/fixtures/fhir_as_csv`` holds the
same data written by hand as canonical CSV tables: the expected conversion. Edge cases covered:
year-only and year-month birth dates, a death dateTime with a time zone, deceasedBoolean without
a date, absolute and versioned references, SNOMED-only and uncoded Conditions, a Condition coded
twice with the same ICD-10 code, an RxNorm-only request, a blood pressure panel with components,
a comparator (``>90``), printed unit vs UCUM code, a valueString, an unmapped LOINC code, a
non-LOINC observation, a missing value and a missing encounter start.
"""

from __future__ import annotations

import csv
import importlib
import json
import shutil
from pathlib import Path

import polars as pl
import pytest
from sqlglot import exp

from pipeline.compile import Plan, Stage
from pipeline.engine import DuckDBEngine
from pipeline.errors import ExtractError
from pipeline.extract import discover_extract
from pipeline.extract.readers.fhir import BUILDERS, FHIR_COLUMNS, fhir_source
from pipeline.workflows.build import BuildOptions, build_study, plan_study

from .conftest import DEMO_STUDY, ROOT

FHIR = ROOT / "tests" / "fixtures" / "fhir"
AS_CSV = ROOT / "tests" / "fixtures" / "fhir_as_csv"
TABLES = ("patients", "encounters", "diagnoses", "prescriptions", "measurements")


def _fhir_lines() -> list[tuple[str, int, dict[str, object]]]:
    lines = []
    for path in sorted(FHIR.glob("*.ndjson")):
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
            lines.append((path.name, number, json.loads(line)))
    return lines


def test_fixture_resources_are_valid_fhir() -> None:
    # Source: the `fhir.resources` package (8.x), whose R4B models validate R4 resources of these
    # types (Patient, Encounter, Condition, MedicationRequest/Statement, Observation are the same
    # shape in R4 and R4B); unknown fields and malformed dates are rejected.
    pytest.importorskip("fhir.resources.R4B")
    lines = _fhir_lines()
    assert len(lines) == 66
    for name, number, resource in lines:
        kind = str(resource["resourceType"])
        assert name.startswith(kind), (name, number)
        module = importlib.import_module(f"fhir.resources.R4B.{kind.lower()}")
        getattr(module, kind).model_validate(resource)


def _source_rows(
    extract: Path, *, usable_only: bool = False
) -> dict[str, list[tuple[str | None, ...]]]:
    """Every canonical table as the engine binds it (``src_<table>``), values as text, sorted.

    ``usable_only`` leaves out the rows the reader itself set aside (``source_problem``).
    """
    plan = plan_study(DEMO_STUDY)
    tables = discover_extract(extract, plan.sources)
    kept = exp.column("source_problem").is_(exp.null()) if usable_only else exp.true()
    stages = tuple(
        Stage(
            f"read_{s.name}",
            exp.select(*(exp.cast(exp.column(c), "VARCHAR").as_(c) for c in s.columns))
            .from_(s.relation)
            .where(kept.copy()),
            f"the {s.name} table as bound",
        )
        for s in plan.sources
    )
    outputs = tuple(
        (s.name, f"read_{s.name}", tuple(f"{c} NULLS FIRST" for c in s.columns))
        for s in plan.sources
    )
    run = DuckDBEngine().run(Plan("fhir_test", plan.sources, stages, outputs), tables)
    return {
        name: [tuple(row.values()) for row in table.to_pylist()]
        for name, table in run.outputs.items()
    }


@pytest.fixture(scope="module")
def fhir_rows() -> dict[str, list[tuple[str | None, ...]]]:
    return _source_rows(FHIR)


@pytest.fixture(scope="module")
def csv_rows() -> dict[str, list[tuple[str | None, ...]]]:
    return _source_rows(AS_CSV)


@pytest.mark.parametrize("table", TABLES)
def test_canonical_tables_equal_hand_written_csv(
    fhir_rows: dict[str, list[tuple[str | None, ...]]],
    csv_rows: dict[str, list[tuple[str | None, ...]]],
    table: str,
) -> None:
    assert fhir_rows[table] == csv_rows[table]


def _where(rows: list[tuple[str | None, ...]], patient: str) -> list[tuple[str | None, ...]]:
    return [row for row in rows if row[0] == patient]


def test_edge_cases(fhir_rows: dict[str, list[tuple[str | None, ...]]]) -> None:
    # patients columns: patient_id, sex, death_date, birth_date, birth_year, practice_id, ...
    patients = {row[0]: row[:6] for row in fhir_rows["patients"]}
    assert patients["OB-002"] == ("OB-002", "M", None, None, "1955", "ORG-HARBOUR")  # year only
    # Year-month birth date -> the 15th; the death date keeps its local date part; the
    # practice id comes from an absolute, versioned reference.
    assert patients["OB-003"] == ("OB-003", "F", "2018-09-30", "1948-06-15", None, "ORG-LIGHTHOUSE")
    assert patients["OB-004"][2] is None  # deceasedBoolean true, no date: followed as alive
    assert patients["OB-005"][1] == "U"  # gender other
    # Absolute and versioned subject references give the bare id; unknown patients stay.
    assert [r[1] for r in _where(fhir_rows["encounters"], "OB-007")] == ["2011-11-11", "2015-04-04"]
    assert _where(fhir_rows["encounters"], "OB-099") == [("OB-099", "2015-05-05", "amb")]
    assert ("OB-008", None, "amb") in fhir_rows["encounters"]  # no period.start
    # diagnoses: patient_id, event_date, code_system, code, source
    assert _where(fhir_rows["diagnoses"], "OB-004") == [
        # SNOMED CT only, in a study reading ICD-10: its known coding, used and matching nothing
        ("OB-004", "2016-02-01", "SNOMED", "38341003", "problem_list"),
        ("OB-004", "2016-08-01", None, None, "visit"),
    ]
    # The same code under icd-10 and icd-10-cm is one row; a year-month onset -> the 15th.
    assert len(_where(fhir_rows["diagnoses"], "OB-001")) == 2
    assert ("OB-007", "2013-02-15", "ICD10", "E11.65", "problem_list") in fhir_rows["diagnoses"]
    # prescriptions: patient_id, start_date, atc, stop_date (boundsPeriod end wins)
    assert ("OB-001", "2017-06-02", "A10BA02", "2017-12-01") in fhir_rows["prescriptions"]
    assert ("OB-007", "2014-06-06", None, None) in fhir_rows["prescriptions"]  # RxNorm only
    # measurements: patient_id, obs_date, measure, unit, value, value_text
    measurements = fhir_rows["measurements"]
    assert ("OB-001", "2015-02-10", "sbp", "mm[Hg]", "142", None) in measurements  # component
    assert ("OB-002", "2016-03-03", "creatinine", "umol/L", "88", None) in measurements
    assert ("OB-003", "2014-01-01", "egfr", "mL/min/{1.73_m2}", None, ">90") in measurements
    assert ("OB-004", "2016-08-01", "hba1c", "%", "7.4", None) in measurements  # code, no unit
    assert ("OB-008", "2015-03-01", "loinc:2339-0", "mmol/L", "5.4", None) in measurements


def test_year_only_birth_date_takes_1_july() -> None:
    plan = plan_study(DEMO_STUDY)
    tables = discover_extract(FHIR, plan.sources)
    base = DuckDBEngine().run(plan.through("patient_base"), tables).outputs["patient_base"]
    births = {r["patient_id"]: r["birth_date"].isoformat() for r in base.to_pylist()}
    assert births["OB-002"] == "1955-07-01"


@pytest.fixture(scope="module")
def builds(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    out = tmp_path_factory.mktemp("fhir_builds")
    return {
        name: build_study(DEMO_STUDY, BuildOptions(extract=folder, out=out / name)).out
        for name, folder in (("fhir", FHIR), ("csv", AS_CSV))
    }


def test_cohort_from_fhir_equals_cohort_from_csv(builds: dict[str, Path]) -> None:
    fhir = pl.read_parquet(builds["fhir"] / "cohort.parquet")
    from_csv = pl.read_parquet(builds["csv"] / "cohort.parquet")
    assert fhir.schema == from_csv.schema
    assert fhir.equals(from_csv)
    assert fhir["patient_id"].to_list() == ["OB-001", "OB-002", "OB-003", "OB-004", "OB-007"]
    assert fhir.filter(pl.col("incident_heart_failure"))["patient_id"].to_list() == ["OB-002"]
    assert (builds["fhir"] / "attrition.csv").read_text() == (
        builds["csv"] / "attrition.csv"
    ).read_text()
    # Both name the first row of each reason (FHIR: the line); the FHIR reader says more
    # precisely why a row was set aside, and the used rows are the same.
    quality = {name: _quality(builds[name]) for name in ("fhir", "csv")}
    assert quality["fhir"]["encounters", "missing date"] == ("1", "Encounter.ndjson", "21")
    assert quality["csv"]["encounters", "unparseable date"] == ("1", "encounters.csv", "21")
    assert quality["fhir"]["diagnoses", "year-only date"] == ("1", "Condition.ndjson", "5")
    assert quality["fhir"]["prescriptions", "unknown code system"][0] == "1"  # RxNorm only
    assert quality["csv"]["prescriptions", "malformed code"][0] == "1"  # no atc
    for table in TABLES:
        used = [quality[name][table, "used"][0] for name in ("fhir", "csv")]
        assert used[0] == used[1], table


def _quality(out: Path) -> dict[tuple[str, str], tuple[str, str, str]]:
    with (out / "quality.csv").open(encoding="utf-8") as handle:
        return {
            (r["source_table"], r["reason"]): (r["n_rows"], r["first_file"], r["first_row"])
            for r in csv.DictReader(handle)
        }


def test_every_fhir_row_is_accounted_for(builds: dict[str, Path]) -> None:
    with (builds["fhir"] / "quality.csv").open(encoding="utf-8") as handle:
        quality = list(csv.DictReader(handle))
    per_table = dict.fromkeys(TABLES, 0)
    for row in quality:
        per_table[row["source_table"]] += int(row["n_rows"])
    # 8 patients; 22 encounters; 11 Conditions -> 12 rows (one coded ICD-10 and ICD-9);
    # 5 medication resources; 20 Observations -> 21 rows (a panel of two components).
    assert per_table == {
        "patients": 8,
        "encounters": 22,
        "diagnoses": 12,
        "prescriptions": 5,
        "measurements": 21,
    }
    set_aside = {(r["source_table"], r["reason"]) for r in quality if r["outcome"] != "used"}
    assert ("diagnoses", "unknown code system") in set_aside
    assert ("encounters", "orphan patient") in set_aside
    assert ("measurements", "unknown measure") in set_aside


def test_builders_give_the_declared_columns() -> None:
    assert set(BUILDERS) == set(FHIR_COLUMNS)
    for name, builder in BUILDERS.items():
        given = FHIR_COLUMNS[name] + ("source_position", "source_problem")
        assert tuple(builder({}).named_selects) == given


def test_missing_resource_types_give_empty_tables(tmp_path: Path) -> None:
    # Bulk export writes no file for a type without resources; other file-name shapes work.
    export = tmp_path / "export"  # the output goes beside it: an output inside it is refused
    export.mkdir()
    shutil.copy(FHIR / "Patient.ndjson", export / "Patient.000.ndjson")
    shutil.copy(FHIR / "Encounter.ndjson", export / "1.Encounter.ndjson")
    (export / "Observation_2.ndjson").write_text("", encoding="utf-8")
    plan = plan_study(DEMO_STUDY)
    tables = discover_extract(export, plan.sources)
    assert tables["patients"].files == (export / "Patient.000.ndjson",)
    assert tables["encounters"].resources == ("Encounter",)
    assert tables["diagnoses"].files == ()
    result = build_study(DEMO_STUDY, BuildOptions(extract=export, out=tmp_path / "out"))
    assert result.cohort_rows == 5
    assert "READ_CSV" in fhir_source(tables["measurements"]).sql("duckdb").upper()


def test_folder_without_patients_or_with_both_kinds_is_refused(tmp_path: Path) -> None:
    plan = plan_study(DEMO_STUDY)
    shutil.copy(FHIR / "Encounter.ndjson", tmp_path / "Encounter.ndjson")
    with pytest.raises(ExtractError, match="without Patient resources"):
        discover_extract(tmp_path, plan.sources)
    shutil.copy(FHIR / "Patient.ndjson", tmp_path / "Patient.ndjson")
    shutil.copy(AS_CSV / "patients.csv", tmp_path / "patients.csv")
    with pytest.raises(ExtractError, match="both FHIR NDJSON files and canonical tables"):
        discover_extract(tmp_path, plan.sources)
