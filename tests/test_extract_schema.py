"""The canonical schema is defined once (pipeline/extract/schema.py) and read everywhere.

Also: the extract package no longer depends on the compiler, the synthetic FHIR writer uses the
readers' public names only, and extract errors carry a stable code and the place at fault.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

from pipeline.compile import _quality, _sources
from pipeline.errors import ExtractError
from pipeline.extract import discover_extract
from pipeline.extract.readers.fhir import FHIR_COLUMNS
from pipeline.extract.schema import CANONICAL_TABLES, DATE_COLUMNS, TABLES, all_sources

from .conftest import HANDMADE, ROOT

PACKAGE = ROOT / "pipeline"


def test_the_compiler_reads_the_tables_the_schema_defines() -> None:
    # The plan's view of each table is derived, not written a second time.
    compiled = (
        _sources.PATIENTS,
        _sources.ENCOUNTERS,
        _sources.DIAGNOSES,
        _sources.PRESCRIPTIONS,
        _sources.MEASUREMENTS,
    )
    assert compiled == all_sources()
    assert TABLES["patients"].dates == _sources.PATIENT_DATES
    # drug_text is canonical but read by no study (unread): not in the plan's columns.
    assert "drug_text" in TABLES["prescriptions"].column_names
    assert "drug_text" not in _sources.PRESCRIPTIONS.columns


def test_schema_facts() -> None:
    # Our own schema (no external source): the facts the five former copies agreed on.
    assert [t.name for t in CANONICAL_TABLES] == [
        "patients", "encounters", "diagnoses", "prescriptions", "measurements"
    ]  # fmt: skip
    assert {t.name: t.row_date for t in CANONICAL_TABLES} == {
        "patients": "birth_date",
        "encounters": "encounter_date",
        "diagnoses": "event_date",
        "prescriptions": "start_date",
        "measurements": "obs_date",
    }
    assert "birth_year" not in DATE_COLUMNS
    assert "stop_date" in DATE_COLUMNS
    assert TABLES["measurements"].source.one_of == (("value", "value_text"),)
    # FHIR gives every canonical column but the registration dates, in canonical order.
    assert FHIR_COLUMNS["patients"] == (
        "patient_id", "birth_date", "birth_year", "sex", "death_date", "practice_id"
    )  # fmt: skip
    assert all(FHIR_COLUMNS[t.name] == t.column_names for t in CANONICAL_TABLES[1:])


def test_no_other_module_spells_out_the_schema() -> None:
    # The copies the schema replaced are gone: no table -> date column dictionaries.
    assert not hasattr(_quality, "_DATE_COLUMNS")
    spelled = '"encounters": "encounter_date"'
    found = [
        str(p.relative_to(ROOT))
        for p in PACKAGE.rglob("*.py")
        if spelled in p.read_text(encoding="utf-8")
    ]
    assert found == []


def _imports(path: Path) -> list[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    return [n.module for n in ast.walk(tree) if isinstance(n, ast.ImportFrom) and n.module]


def test_imports_run_one_way() -> None:
    backwards = [
        (str(p.relative_to(ROOT)), m)
        for p in (PACKAGE / "extract").rglob("*.py")
        for m in _imports(p)
        if m.startswith(("pipeline.compile", "pipeline.engine"))
    ]
    assert backwards == []
    private = [
        (str(p.relative_to(ROOT)), m)
        for p in (PACKAGE / "synth").glob("*.py")
        for m in _imports(p)
        if m.startswith(("pipeline.engine.", "pipeline.compile.", "pipeline.extract."))
        and any(part.startswith("_") for part in m.split("."))
    ]
    assert private == []


def test_locating_an_extract_loads_no_compiler() -> None:
    # The compile package loads its passes lazily; its `names` module (pure strings, which the
    # config's column checks read) is the one part of it that may come along.
    script = (
        "import sys\n"
        "from pipeline.extract import discover_extract, fhir_source, source_column\n"
        "light = {'pipeline.compile', 'pipeline.compile.names'}\n"
        "late = ('pipeline.compile', 'pipeline.engine')\n"
        "loaded = [m for m in sys.modules if m.startswith(late) and m not in light]\n"
        "assert loaded == [], loaded\n"
    )
    subprocess.run([sys.executable, "-c", script], check=True, cwd=ROOT)


def _folder(tmp_path: Path, *names: str) -> Path:
    folder = tmp_path / "extract"
    folder.mkdir()
    for name in names:
        (folder / name).write_bytes((HANDMADE / name).read_bytes())
    return folder


def test_a_missing_table_has_its_code_and_folder(tmp_path: Path) -> None:
    folder = _folder(tmp_path, "patients.csv")
    with pytest.raises(ExtractError) as caught:
        discover_extract(folder, all_sources()[:2])
    assert caught.value.code == "missing-table"
    assert caught.value.where == str(folder)
    assert caught.value.message.startswith("table 'encounters' not found")
    assert str(caught.value).startswith(f"{folder} [missing-table] table 'encounters'")


def test_an_unreadable_file_has_its_code_and_file(tmp_path: Path) -> None:
    folder = _folder(tmp_path, "patients.csv")
    bad = folder / "encounters.parquet"
    bad.write_text("patient_id,encounter_date\n", encoding="utf-8")
    with pytest.raises(ExtractError) as caught:
        discover_extract(folder, all_sources()[:2])
    assert (caught.value.code, caught.value.where) == ("unreadable-file", str(bad))
    assert caught.value.message.startswith("not a readable Parquet file")


def test_a_bad_header_line_is_located_at_line_one(tmp_path: Path) -> None:
    folder = _folder(tmp_path, "patients.csv")
    bad = folder / "encounters.csv"
    bad.write_text("patient_id;encounter_date\n", encoding="utf-8")
    with pytest.raises(ExtractError) as caught:
        discover_extract(folder, all_sources()[:2])
    assert (caught.value.code, caught.value.where) == ("wrong-delimiter", f"{bad}:1")
