"""The exact-duplicate check finds copies through a row hash, confirmed on every column.

The quality log groups each table on one integer, the row's hash, and groups on all columns
only the rows whose hash another row shares (``rows_with_copies`` in compile/_judged.py). The
hash is a filter: these tests build a small extract with the real hash and with a hash that
makes every row collide, and both must count the same rows as copies.
"""

from __future__ import annotations

import csv
from pathlib import Path

import pytest
from sqlglot import exp

from pipeline.compile import _judged
from pipeline.workflows.build import BuildOptions, build_study

from .helpers import demo_study_variant, run_stage, write_extract

D = "2015-06-01"
DX = {"patient_id": "A", "event_date": D, "code_system": "ICD10", "code": "I50.9", "source": "gp"}
RX = {"patient_id": "A", "start_date": D, "atc": "C03CA01", "stop_date": "2015-07-01"}
EN = {"patient_id": "A", "encounter_date": D, "encounter_type": "consultation"}
MS = {"patient_id": "A", "obs_date": D, "measure": "hba1c", "unit": "%", "value": "7.1"}

# Exact copies, and rows that differ from them in one compared column only.
TABLES = {
    "patients": [
        {"patient_id": "A", "birth_date": "1950-01-01", "sex": "F"},
        {"patient_id": "B", "birth_date": "1951-01-01", "sex": "M"},
        {"patient_id": "B", "birth_date": "1951-01-01", "sex": "M"},  # a copy
        {"patient_id": "C", "birth_date": "1951-01-01", "sex": "M"},  # B but for the id
    ],
    "encounters": [
        EN,
        EN,  # a copy
        EN,  # a second copy
        EN | {"encounter_type": "telephone"},  # differs in the type only
        EN | {"patient_id": "B"},  # differs in the patient only
        EN | {"encounter_date": "2020-01-01"},  # after end of data ...
        EN | {"encounter_date": "2020-01-01"},  # ... and its copy
        EN | {"patient_id": "Z"},  # an orphan ...
        EN | {"patient_id": "Z"},  # ... and its copy (an id, though unknown: a duplicate)
    ],
    "diagnoses": [
        DX,
        DX,  # a copy
        DX | {"source": "hospital"},  # differs in the source only
        DX | {"code": "I50.1"},  # differs in the code only
        DX | {"event_date": "2020-02-01"},  # after end of data, a hash of its own
        DX | {"event_date": "2020-03-01"},  # the same reason, a later row: not the first
    ],
    "prescriptions": [
        RX,
        RX | {"stop_date": "2015-08-01"},  # differs in the stop date only: no copy
        RX | {"stop_date": "2015-08-01"},  # ... but a copy of the row above
    ],
    "measurements": [
        MS,
        MS,  # a copy
        MS | {"value": "7.2"},  # differs in the value only
        MS | {"value_text": "7.1 %"},  # differs in value_text only (never read: value wins)
        MS | {"patient_id": "B"},  # differs in the patient only
        MS | {"measure": "hba1"},  # an unknown measure...
        MS | {"measure": "hba1"},  # ... and its copy: a duplicate under its own reason
    ],
}

EXPECTED = {
    ("patients", "used"): 3,
    ("patients", "exact duplicate"): 1,
    ("encounters", "used"): 3,
    ("encounters", "exact duplicate"): 4,
    ("encounters", "after end of data"): 1,
    ("encounters", "orphan patient"): 1,
    ("diagnoses", "used"): 3,
    ("diagnoses", "exact duplicate"): 1,
    ("diagnoses", "after end of data"): 2,
    ("prescriptions", "used"): 2,
    ("prescriptions", "exact duplicate"): 1,
    ("measurements", "used"): 4,
    ("measurements", "unknown measure"): 1,
    ("measurements", "exact duplicate"): 2,
}


def _quality(folder: Path) -> tuple[dict[tuple[str, str], int], bytes]:
    """Build the demo study on the small extract; quality.csv's counts and its bytes."""
    extract = write_extract(folder / "extract", TABLES)
    study = demo_study_variant(folder / "study", output="allow_empty_cohort: true")
    build_study(study, BuildOptions(extract=extract, out=folder / "out"))
    text = (folder / "out" / "quality.csv").read_bytes()
    with (folder / "out" / "quality.csv").open(encoding="utf-8") as handle:
        counts = {
            (r["source_table"], r["reason"]): int(r["n_rows"]) for r in csv.DictReader(handle)
        }
    return counts, text


@pytest.fixture(scope="module")
def by_hash(tmp_path_factory: pytest.TempPathFactory) -> tuple[dict[tuple[str, str], int], bytes]:
    return _quality(tmp_path_factory.mktemp("by_hash"))


def test_copies_are_found_and_near_copies_are_not(
    by_hash: tuple[dict[tuple[str, str], int], bytes],
) -> None:
    counts, _ = by_hash
    assert counts == EXPECTED


def test_every_row_colliding_gives_the_same_log(
    by_hash: tuple[dict[tuple[str, str], int], bytes],
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # A constant hash: every row of a table shares it with every other, so only the exact
    # confirmation on all columns can tell copies from rows that differ in one column. The
    # bytes include the first row of each reason set aside (first_file, first_row), which
    # must not depend on which rows the hash let through to the exact grouping.
    # (A cast, since GROUP BY 7 would name the seventh column.)
    constant = exp.cast(exp.Literal.number(7), "BIGINT")
    monkeypatch.setattr(_judged, "row_hash", lambda columns: constant.copy())
    counts, text = _quality(tmp_path)
    assert counts == EXPECTED
    assert text == by_hash[1]
    # The first diagnosis set aside after the end of data is the CSV's record 5.
    assert b"diagnoses,set aside,after end of data,2,diagnoses.csv,5" in text


def _values(folder: Path) -> list[tuple[str, str, float]]:
    """The demo study's usable measurement values on the small extract."""
    rows = run_stage(write_extract(folder, TABLES), "measurement_values")
    return sorted((r["patient_id"], r["measure"], r["value"]) for r in rows)


def test_usable_measurements_are_kept_once_whatever_the_hash(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # measurement_values takes rows whose hash is shared from measurement_copies, each
    # distinct row once; the copy of the first row is not a second value. Two rows differing
    # in value_text alone are two rows, as the log counts them.
    expected = [("A", "hba1c", 7.1), ("A", "hba1c", 7.1), ("A", "hba1c", 7.2), ("B", "hba1c", 7.1)]
    assert _values(tmp_path / "real") == expected
    constant = exp.cast(exp.Literal.number(7), "BIGINT")
    monkeypatch.setattr(_judged, "row_hash", lambda columns: constant.copy())
    assert _values(tmp_path / "constant") == expected


def test_the_hash_is_only_a_filter() -> None:
    # The candidates are confirmed by grouping on every column, never on the hash alone.
    from pipeline.compile._sources import DIAGNOSES

    rows = _judged.rows_with_copies(DIAGNOSES)
    grouped = [c.sql() for c in rows.args["group"].expressions]
    assert grouped == [*DIAGNOSES.columns, "source_problem"]
