"""A canonical extract written as FHIR R4 bulk data reads back as the same extract.

The synthetic extract (3,000 patients, seed 5) is generated as Parquet and as a FHIR export
(``generate_extract(file_format="fhir")``, which converts the same Parquet the way a server
would write it: varied forms and extra resources to set aside, :mod:`pipeline.synth._fhir_server`);
the demo study built on both gives the same cohort and the same attrition, the quality log
of the FHIR build holds the extra resources the export recorded, and every canonical row reads
back the same except what :mod:`pipeline.synth._fhir_export` lists as not round-tripping and
the units the server look converts (compared as the registry converts them).
"""

from __future__ import annotations

import csv
import importlib
import json
import math
from collections import Counter
from pathlib import Path

import polars as pl
import pytest

from pipeline.config import shipped_measures
from pipeline.extract.readers.fhir import ICD_SYSTEMS, SNOMED_SMOKING, STATUS_SET_ASIDE
from pipeline.synth import generate_extract
from pipeline.synth._fhir_export import write_fhir_export
from pipeline.synth._fhir_server import (
    EXTRAS,
    ICD9_CM_OID,
    ICD10_CM_OID,
    SMOKING_CONCEPTS,
    UNIT_FORMS,
    exact_value,
)
from pipeline.workflows.build import BuildOptions, build_study, plan_study

from .conftest import DEMO_STUDY, ROOT
from .test_fhir import _source_rows

TYPES = ("Patient", "Encounter", "Condition", "MedicationRequest", "Observation")
SERVER_TYPES = (*TYPES[:4], "MedicationStatement", "Medication", TYPES[4])
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
        [f"{t}.ndjson" for t in SERVER_TYPES]
        + ["scenario.json", "truth.parquet", "ascertain-synth.json"]
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


def _recorded_set_aside(extract: Path) -> dict[tuple[str, str], int]:
    meta = json.loads((extract / "scenario.json").read_text(encoding="utf-8"))
    rows = meta["fhir_export"]["set_aside"]
    return {(r["table"], r["reason"]): r["resources"] for r in rows}


def test_quality_log_sets_aside_the_extra_resources(
    extracts: dict[str, Path], builds: dict[str, Path]
) -> None:
    parquet, fhir = _quality(builds["parquet"]), _quality(builds["fhir"])
    extra = _recorded_set_aside(extracts["fhir"])
    # each status the reader sets aside, in each table that can hold it, was written
    expected = {
        (table, STATUS_SET_ASIDE[kind][status])
        for table, choices in EXTRAS.items()
        for kind, status in choices
    }
    assert set(extra) == expected
    assert all(n > 0 for n in extra.values())
    for key, n in extra.items():
        assert key not in parquet
        assert fhir[key] == n, key  # the quality log counts exactly what the export wrote
    statuses = {r for reasons in STATUS_SET_ASIDE.values() for r in reasons.values()}
    assert {k for k in fhir if k[1] in statuses} == set(extra)
    for table in {t for t, _ in parquet}:
        read = [sum(n for (t, _), n in log.items() if t == table) for log in (parquet, fhir)]
        extras = sum(n for (t, _), n in extra.items() if t == table)
        assert read[1] == read[0] + extras, table  # every row read from both, and the extras
    # apart from the extras, billing and visit rows that differ only in source are exact
    # duplicates in FHIR
    assert {k: v for k, v in parquet.items() if k[0] != "diagnoses"} == {
        k: v for k, v in fhir.items() if k[0] != "diagnoses" and k not in extra
    }
    assert fhir["diagnoses", "exact duplicate"] > parquet["diagnoses", "exact duplicate"]


def _named_rows(extract: Path) -> Rows:
    columns = {s.name: s.columns for s in plan_study(DEMO_STUDY).sources}
    return {
        name: [dict(zip(columns[name], row, strict=True)) for row in rows]
        for name, rows in _source_rows(extract, usable_only=True).items()
    }


def _canonical_value(row: dict[str, str | None]) -> dict[str, str | None]:
    """A converted unit's row as its canonical value, converted as the pipeline does."""
    measure = shipped_measures().get(row.get("measure") or "")
    if measure is None or row["measure"] not in UNIT_FORMS or row["value"] is None:
        return row
    source, code, _ = UNIT_FORMS[measure.name]
    if row["unit"] not in (source, code):
        return row
    conversion = measure.conversion(row["unit"] or "")
    assert conversion is not None
    value = conversion.to_canonical(float(row["value"]))
    return {**row, "value": repr(value), "unit": measure.canonical_unit}


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
        expected = Counter(
            tuple(_canonical_value(_as_fhir_reads_it(table, r)).items()) for r in rows
        )
        got = Counter(tuple(_canonical_value(r).items()) for r in fhir[table])
        assert got == expected, table
    # the converted units are read back as often as the export wrote them
    meta = json.loads((extracts["fhir"] / "scenario.json").read_text(encoding="utf-8"))
    forms = meta["fhir_export"]["forms"]
    units = Counter(r["unit"] for r in fhir["measurements"])
    for code in ("[lb_av]", "[in_i]", "mmol/L"):
        assert units[code] == forms[f"Observation in {code}"] > 0, code
    # what the comparison covers: comparators, orphans, both sources, ICD-9 and lower case
    texts = {r["value_text"] for r in fhir["measurements"]}
    assert {">90", "<0.6"} <= texts
    assert {r["source"] for r in fhir["diagnoses"]} == {"problem_list", "visit"}


def test_export_is_deterministic(extracts: dict[str, Path], tmp_path: Path) -> None:
    export = write_fhir_export(extracts["parquet"], tmp_path, seed=5)
    assert [f.name for f in export.files] == [f"{t}.ndjson" for t in SERVER_TYPES]
    for path in export.files:
        assert path.read_bytes() == (extracts["fhir"] / path.name).read_bytes(), path.name
    assert export.set_aside == _recorded_set_aside(extracts["fhir"])
    # another seed chooses other rows for the varied forms and the extras
    other = write_fhir_export(extracts["parquet"], tmp_path / "other", seed=6)
    assert other.files[2].read_bytes() != (extracts["fhir"] / "Condition.ndjson").read_bytes()
    # without a seed: the plain twin, five files
    plain = write_fhir_export(extracts["parquet"], tmp_path / "plain")
    assert [f.name for f in plain.files] == [f"{t}.ndjson" for t in TYPES]
    assert plain.set_aside == {}


def test_exported_resources_are_valid_fhir(extracts: dict[str, Path]) -> None:
    # Source: the `fhir.resources` package (8.x), whose R4B models validate R4 resources of these
    # types (the same shape in R4 and R4B), as in tests/test_fhir.py.
    pytest.importorskip("fhir.resources.R4B")
    checked: Counter[str] = Counter()
    for kind in SERVER_TYPES:
        model = getattr(importlib.import_module(f"fhir.resources.R4B.{kind.lower()}"), kind)
        with (extracts["fhir"] / f"{kind}.ndjson").open(encoding="utf-8") as handle:
            for number, line in enumerate(handle, start=1):
                # the first lines, every 997th, and up to 30 lines of each marked form
                marks = [m for m in FORM_MARKS if m in line and checked[m] < 30]
                if number <= 40 or number % 997 == 0 or marks:
                    resource = json.loads(line)
                    assert resource["resourceType"] == kind
                    model.model_validate(resource)
                    checked.update([kind, *marks])
    assert all(checked[kind] >= 20 for kind in SERVER_TYPES), checked
    assert all(checked[mark] >= 10 for mark in FORM_MARKS), checked


# Text that marks a line written in one of the varied forms (or a set-aside status).
FORM_MARKS = (
    '"comparator"',
    '"valueString"',
    '"valueInteger"',
    '"issued"',
    '"component"',
    '"contained"',
    '"medicationReference"',
    '"[lb_av]"',
    '"[in_i]"',
    '"mmol/L"',
    "urn:oid:",
    '"refuted"',
    '"entered-in-error"',
    '"cancelled"',
    '"not-taken"',
)


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
    files = write_fhir_export(extract, tmp_path / "fhir").files
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


def _server_look_extract(folder: Path) -> Path:
    """A small canonical CSV extract holding every row the server look writes differently."""
    folder.mkdir()
    tables: dict[str, list[str]] = {
        "patients": ["patient_id,birth_date,birth_year,sex,death_date,practice_id"],
        "encounters": ["patient_id,encounter_date,encounter_type"],
        "diagnoses": ["patient_id,event_date,code_system,code,source"],
        "prescriptions": ["patient_id,start_date,stop_date,atc,drug_text"],
        "measurements": ["patient_id,obs_date,measure,value,value_text,unit"],
    }
    for n in range(1, 41):
        pid, day = f"S-{n}", f"2015-{n % 12 + 1:02d}-{n % 27 + 1:02d}"
        smoking = ("current", "former", "never")[n % 3]
        tables["patients"].append(f"{pid},1960-01-0{n % 9 + 1},,{'FM'[n % 2]},,P01")
        tables["encounters"].append(f"{pid},{day},visit")
        tables["diagnoses"] += [
            f"{pid},{day},ICD10,E11.{n % 10},visit",
            f"{pid},{day},ICD9,428,problem_list",
        ]
        tables["prescriptions"].append(f"{pid},{day},,C03CA01,furosemide {n} mg")
        tables["measurements"] += [
            f"{pid},{day},smoking,,{smoking},",
            f"{pid},{day},sbp,{120 + n},,",  # a whole number without a unit
            f"{pid},{day},weight,{60 + n / 4},,kg",
            f"{pid},{day},height,{150.5 + n},,cm",
            f"{pid},{day},creatinine,{0.5 + n / 50},,mg/dL",
            f"{pid},{day},sbp,{130 + n},,mmHg",
            f"{pid},{day},dbp,{80 + n},,mmHg",
        ]
    for name, lines in tables.items():
        (folder / f"{name}.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    return folder


def test_server_look_reads_back_the_same_rows(tmp_path: Path) -> None:
    extract = _server_look_extract(tmp_path / "extract")
    export = write_fhir_export(extract, tmp_path / "fhir", seed=11)
    # every varied form the module docstring lists was written at least once
    assert {
        "Observation smoking status as SNOMED CT",
        "Observation valueInteger",
        "Observation in [lb_av]",
        "Observation in [in_i]",
        "Observation in mmol/L",
        "Observation dated by issued only",
        "Observation panel with two components",
        "Observation with its own value and a component",
        "MedicationRequest with a contained Medication",
        "MedicationRequest with a Medication reference",
        f"Condition coded by {ICD10_CM_OID}",
        f"Condition coded by {ICD9_CM_OID}",
    } <= set(export.forms)
    columns = {s.name: s.columns for s in plan_study(DEMO_STUDY).sources}

    def rows(folder: Path) -> dict[str, Counter[tuple[tuple[str, str | None], ...]]]:
        return {
            name: Counter(
                tuple(_canonical_value(dict(zip(columns[name], row, strict=True))).items())
                for row in table
            )
            for name, table in _source_rows(folder, usable_only=True).items()
        }

    assert rows(tmp_path / "fhir") == rows(extract)
    # the reader's own maps: the OIDs are its ICD systems, each smoking concept its category
    assert ICD_SYSTEMS[ICD10_CM_OID] == "ICD10"
    assert ICD_SYSTEMS[ICD9_CM_OID] == "ICD9"
    for category, (code, _) in SMOKING_CONCEPTS.items():
        assert SNOMED_SMOKING[code] == category


def test_exact_value_round_trips_or_declines() -> None:
    pound = shipped_measures()["weight"].conversion("[lb_av]")
    assert pound is not None
    declined = []
    for tenth in range(300, 2000):
        kg = tenth / 10
        pounds = exact_value(kg, pound)
        if pounds is None:
            declined.append(kg)
        else:
            assert pound.to_canonical(pounds) == kg  # the engine's arithmetic gives kg back
    assert 0 < len(declined) < 1700 / 2  # most values have an exact twin, some have none
    for kg in declined:  # none indeed: no double near the inverse converts back to it
        near = kg / pound.factor
        for _ in range(3):
            near = math.nextafter(near, 0.0)
        for _ in range(7):
            assert pound.to_canonical(near) != kg
            near = math.nextafter(near, math.inf)
