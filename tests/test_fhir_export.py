"""A canonical extract written as FHIR R4 bulk data reads back as the same extract.

The synthetic extract (3,000 patients, seed 5) is generated as Parquet and as a FHIR export
(``generate_extract(file_format="fhir")``, which converts the same Parquet); the demo study built
on both gives the same cohort and the same attrition, and every canonical row reads back the
same except what :mod:`pipeline.synth._fhir_export` lists as not round-tripping.
"""

from __future__ import annotations

import csv
import importlib
import json
from collections import Counter
from pathlib import Path

import polars as pl
import pytest

from pipeline._build import BuildOptions, build_study, plan_study
from pipeline.synth import generate_extract
from pipeline.synth._fhir_export import write_fhir_export

from .conftest import DEMO_STUDY, ROOT
from .test_fhir import _source_rows

TYPES = ("Patient", "Encounter", "Condition", "MedicationRequest", "Observation")
Rows = dict[str, list[dict[str, str | None]]]


@pytest.fixture(scope="module")
def extracts(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    base = tmp_path_factory.mktemp("fhir_export")
    generate_extract(base / "parquet", patients=3000, seed=5)
    generate_extract(base / "fhir", patients=3000, seed=5, file_format="fhir")
    return {"parquet": base / "parquet", "fhir": base / "fhir", "base": base}


@pytest.fixture(scope="module")
def builds(extracts: dict[str, Path]) -> dict[str, Path]:
    return {
        name: build_study(
            DEMO_STUDY, BuildOptions(extract=extracts[name], out=extracts["base"] / f"out_{name}")
        ).out
        for name in ("parquet", "fhir")
    }


def _cohort(folder: Path) -> pl.DataFrame:
    cohort = pl.read_parquet(folder / "cohort.parquet")
    return cohort.with_columns(pl.col("patient_id").cast(pl.String)).sort("patient_id")


def test_generated_export_has_the_bulk_data_files(extracts: dict[str, Path]) -> None:
    names = sorted(p.name for p in extracts["fhir"].iterdir())
    expected = sorted(
        [f"{t}.ndjson" for t in TYPES] + ["scenario.json", "truth.parquet", "ascertain-synth.json"]
    )
    assert names == expected
    meta = json.loads((extracts["fhir"] / "scenario.json").read_text(encoding="utf-8"))
    assert meta["file_format"] == "fhir"


def test_cohort_and_attrition_are_identical(builds: dict[str, Path]) -> None:
    from_parquet, from_fhir = _cohort(builds["parquet"]), _cohort(builds["fhir"])
    assert from_parquet.height > 500
    assert from_fhir.schema == from_parquet.schema
    assert from_fhir.equals(from_parquet)
    attrition = [(builds[n] / "attrition.csv").read_text(encoding="utf-8") for n in builds]
    assert attrition[0] == attrition[1]


def _quality(folder: Path) -> dict[tuple[str, str], int]:
    with (folder / "quality.csv").open(encoding="utf-8") as handle:
        return {(r["source_table"], r["reason"]): int(r["n_rows"]) for r in csv.DictReader(handle)}


def test_quality_log_differs_only_where_billing_becomes_visit(builds: dict[str, Path]) -> None:
    parquet, fhir = _quality(builds["parquet"]), _quality(builds["fhir"])
    for table in {t for t, _ in parquet}:
        read = [sum(n for (t, _), n in log.items() if t == table) for log in (parquet, fhir)]
        assert read[0] == read[1], table  # every row read from both
    # billing and visit rows that differ only in source are exact duplicates in FHIR
    assert {k: v for k, v in parquet.items() if k[0] != "diagnoses"} == {
        k: v for k, v in fhir.items() if k[0] != "diagnoses"
    }
    assert fhir["diagnoses", "exact duplicate"] > parquet["diagnoses", "exact duplicate"]


def _named_rows(extract: Path) -> Rows:
    columns = {s.name: s.columns for s in plan_study(DEMO_STUDY).sources}
    return {
        name: [dict(zip(columns[name], row, strict=True)) for row in rows]
        for name, rows in _source_rows(extract).items()
    }


def _as_fhir_reads_it(table: str, row: dict[str, str | None]) -> dict[str, str | None]:
    """A canonical row changed as the module docstring says the reader gives it back."""
    row = dict(row)
    if table == "patients" and row["birth_date"] is not None:
        row["birth_year"] = None
    if table == "patients" and row["sex"] is not None:
        row["sex"] = row["sex"].strip().upper()  # ' M' and 'f' as the pipeline reads them
    if table == "diagnoses" and row["source"] == "billing":
        row["source"] = "visit"
    if table == "measurements" and row["value"] is None and "," in (row["value_text"] or ""):
        row["value_text"], row["unit"] = f"{row['value_text']} {row['unit']}", None
    return row


def test_canonical_rows_read_back(extracts: dict[str, Path]) -> None:
    parquet, fhir = _named_rows(extracts["parquet"]), _named_rows(extracts["fhir"])
    for table, rows in parquet.items():
        expected = Counter(tuple(_as_fhir_reads_it(table, r).items()) for r in rows)
        assert Counter(tuple(r.items()) for r in fhir[table]) == expected, table
    # what the comparison covers: comparators, orphans, both sources, ICD-9 and lower case
    texts = {r["value_text"] for r in fhir["measurements"]}
    assert {">90", "<0.6"} <= texts
    assert {r["source"] for r in fhir["diagnoses"]} == {"problem_list", "visit"}


def test_export_is_deterministic(extracts: dict[str, Path], tmp_path: Path) -> None:
    files = write_fhir_export(extracts["parquet"], tmp_path)
    assert [f.name for f in files] == [f"{t}.ndjson" for t in TYPES]
    for path in files:
        assert path.read_bytes() == (extracts["fhir"] / path.name).read_bytes(), path.name


def test_exported_resources_are_valid_fhir(extracts: dict[str, Path]) -> None:
    # Source: the `fhir.resources` package (8.x), whose R4B models validate R4 resources of these
    # types (the same shape in R4 and R4B), as in tests/test_fhir.py.
    pytest.importorskip("fhir.resources.R4B")
    checked = Counter()
    for kind in TYPES:
        model = getattr(importlib.import_module(f"fhir.resources.R4B.{kind.lower()}"), kind)
        with (extracts["fhir"] / f"{kind}.ndjson").open(encoding="utf-8") as handle:
            for number, line in enumerate(handle, start=1):
                resource = json.loads(line)
                # the first lines, every 997th, and each comparator or valueString
                sampled = number <= 40 or number % 997 == 0
                if sampled or '"comparator"' in line or '"valueString"' in line:
                    assert resource["resourceType"] == kind
                    model.model_validate(resource)
                    checked[kind] += 1
    assert min(checked.values()) >= 40


EDGE_TABLES = {
    "patients": [
        "patient_id,birth_date,birth_year,sex,death_date,practice_id",
        "E-1,,1931,F,2016-02-29,P01",
        "E-2,1970-05-06,,M,,",
        "E-3,,,U,,P02",
        "E-4,1980-01-01,,,,P03",
    ],
    "encounters": [
        "patient_id,encounter_date,encounter_type",
        "E-1,2015-13-04,visit",  # unreadable: written as it is
        "E-1,04/01/2015,phone",
        "E-1,2015-01-04,",
        "E-9,2015-01-05,visit",  # orphan
        ",2015-01-06,home",
    ],
    "diagnoses": [
        "patient_id,event_date,code_system,code,source",
        "E-1,2015-02-01,ICD10,e11.9,problem_list",
        "E-1,2015-02-01,ICD9,250.00,visit",
        "E-2,2015-03-01,READ,C10..,visit",  # unknown code system: kept as the system
        "E-2,2015-03-01,ICD10,,problem_list",
        "E-2,,,,visit",
    ],
    "prescriptions": [
        "patient_id,start_date,stop_date,atc,drug_text",
        "E-1,2015-01-01,2015-06-30,A10BA02,metformin 500 mg",
        "E-1,2015-01-01,,,aspirin",
        "E-2,,,,",
    ],
    "measurements": [
        "patient_id,obs_date,measure,value,value_text,unit",
        "E-1,2015-01-01,hba1c,7.4,,%",
        "E-1,2015-01-01,egfr,,>90,mL/min/1.73m2",
        "E-1,2015-01-01,creatinine,,<0.6,mg/dL",
        "E-1,2015-01-02,creatinine,88,,µmol/L",
        "E-1,2015-01-02,sbp,abc,,mmHg",  # not numeric: a JSON string
        "E-1,2015-01-02,smoking,,never smoker,",
        "E-1,2015-01-02,loinc:2339-0,5.4,,mmol/L",
        "E-2,2015-01-02,weight,,,kg",
        "E-2,2015-01-02,bmi,,,",
    ],
}


def test_edge_rows_read_back_the_same(tmp_path: Path) -> None:
    extract = tmp_path / "extract"
    extract.mkdir()
    for name, lines in EDGE_TABLES.items():
        (extract / f"{name}.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    files = write_fhir_export(extract, tmp_path / "fhir")
    assert len(files) == 5
    assert _source_rows(tmp_path / "fhir") == _source_rows(extract)
    lines = {f.stem: f.read_text(encoding="utf-8").splitlines() for f in files}
    assert json.loads(lines["Patient"][0])["birthDate"] == "1931"
    assert any('"start":"04/01/2015"' in line for line in lines["Encounter"])
    egfr = next(json.loads(x) for x in lines["Observation"] if "62238-1" in x)
    assert egfr["valueQuantity"] == {"comparator": ">", "value": 90, "unit": "mL/min/1.73m2"}


def test_fixture_extract_export_reads_back(tmp_path: Path) -> None:
    # The hand-written canonical twin of the FHIR fixtures (see tests/test_fhir.py).
    source = ROOT / "tests" / "fixtures" / "fhir_as_csv"
    write_fhir_export(source, tmp_path)
    assert _source_rows(tmp_path) == _source_rows(source)
    first = json.loads((tmp_path / "Patient.ndjson").read_text(encoding="utf-8").splitlines()[0])
    assert first["gender"] == "female"
