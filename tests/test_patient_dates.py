"""A patient's written but unreadable date is counted in the quality log, never read as unknown.

Before, a birth date written dd/mm/yyyy fell back to 1 July of birth_year and a death date so
written read as no death, with every patients row counted as used. Now such a patient is set
aside as ``unparseable date`` (and left out of the source population), so a patients file in
another date format stops the build under the share rule.
"""

from __future__ import annotations

import csv
import shutil
from collections.abc import Callable
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.compile._quality import SET_ASIDE_REASONS
from pipeline.config import load_study
from pipeline.outputs._usability import misread_shares
from pipeline.workflows.build import BuildOptions, build_study
from pipeline.workflows.profile import profile_extract

from .conftest import DEMO_STUDY, HANDMADE
from .helpers import demo_study_variant


def _patients_with(folder: Path, change: Callable[[dict[str, str]], None]) -> Path:
    """A copy of the hand-made extract with ``change`` applied to every patients row."""
    extract = folder / "extract"
    shutil.copytree(HANDMADE, extract)
    path = extract / "patients.csv"
    with path.open(encoding="utf-8", newline="") as handle:
        reader = csv.DictReader(handle)
        columns = list(reader.fieldnames or [])
        rows = list(reader)
    for row in rows:
        change(row)
    with path.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=columns, lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
    return extract


def _day_first(text: str) -> str:
    if not text:
        return text
    year, month, day = text.split("-")
    return f"{day}/{month}/{year}"


def _all_day_first(row: dict[str, str]) -> None:
    row["birth_date"] = _day_first(row["birth_date"])
    row["death_date"] = _day_first(row["death_date"])


def _quality(out: Path) -> dict[tuple[str, str], int]:
    with (out / "quality.csv").open(encoding="utf-8") as handle:
        return {(r["source_table"], r["reason"]): int(r["n_rows"]) for r in csv.DictReader(handle)}


def _n_patients() -> int:
    with (HANDMADE / "patients.csv").open(encoding="utf-8", newline="") as handle:
        return sum(1 for _ in csv.DictReader(handle))


def test_unparseable_date_applies_to_patients() -> None:
    # Without it, accept_set_aside could not name the pair and the share rule would skip it.
    assert "patients" in SET_ASIDE_REASONS["unparseable date"].tables
    assert SET_ASIDE_REASONS["unparseable date"].misread


def test_day_first_patient_dates_stop_the_build_with_exit_2(tmp_path: Path) -> None:
    extract = _patients_with(tmp_path, _all_day_first)
    out = tmp_path / "out"
    result = CliRunner().invoke(
        app, ["build", str(DEMO_STUDY), "--extract", str(extract), "--out", str(out), "--quiet"]
    )
    n = _n_patients()
    # Patients with a birth year only and no death have no date to misread.
    with (HANDMADE / "patients.csv").open(encoding="utf-8", newline="") as handle:
        dated = sum(1 for r in csv.DictReader(handle) if r["birth_date"] or r["death_date"])
    assert 0 < dated < n
    assert result.exit_code == 2, result.output
    output = " ".join(result.output.split())  # rich wraps long lines
    share = f"{100 * dated / n:.1f}".removesuffix(".0")
    assert (
        f'patients: {dated:,} of {n:,} rows ({share} %) set aside as "unparseable date"' in output
    )
    assert "(first at patients.csv row 1)" in output
    assert "{table: patients, reason: unparseable date}" in output
    assert "Traceback" not in result.output
    assert not out.exists()


def _bad_death_of(patient_id: str) -> Callable[[dict[str, str]], None]:
    def change(row: dict[str, str]) -> None:
        if row["patient_id"] == patient_id:
            row["death_date"] = _day_first(row["death_date"])

    return change


def test_one_unreadable_death_date_is_counted_and_the_build_goes_on(tmp_path: Path) -> None:
    # HM-018 died on 2015-04-14; written 14/04/2015 the death was read as none before.
    extract = _patients_with(tmp_path, _bad_death_of("HM-018"))
    out = tmp_path / "out"
    result = build_study(DEMO_STUDY, BuildOptions(extract=extract, out=out))
    quality = _quality(out)
    assert quality[("patients", "unparseable date")] == 1
    assert quality[("patients", "used")] == _n_patients() - 1
    population = pq.read_table(out / "population.parquet").column("patient_id").to_pylist()
    assert "HM-018" not in population
    assert result.cohort_rows > 0
    # The patient's other rows are orphans now, and profile counts them as the build does.
    profiled = profile_extract(extract)["tables"]
    assert profiled["encounters"]["orphan_rows"] == quality[("encounters", "orphan patient")]


def test_empty_patient_dates_are_not_unreadable(tmp_path: Path) -> None:
    # Empty death dates mean alive; a date test that is NULL for them would drop every living
    # patient, and blanks around a date are no reason to set it aside.
    def padded(row: dict[str, str]) -> None:
        row["birth_date"] = f" {row['birth_date']} "
        row["death_date"] = row["death_date"] or "  "

    extract = _patients_with(tmp_path, padded)
    out = tmp_path / "out"
    build_study(DEMO_STUDY, BuildOptions(extract=extract, out=out))
    quality = _quality(out)
    assert quality[("patients", "used")] == _n_patients()
    assert ("patients", "unparseable date") not in quality


@pytest.mark.parametrize(("n_bad", "stops"), [(10, False), (11, True)])
def test_patients_fall_under_the_share_rule(tmp_path: Path, n_bad: int, *, stops: bool) -> None:
    study = load_study(demo_study_variant(tmp_path)).study
    log = pa.Table.from_pylist(
        [
            {"source_table": "patients", "outcome": "used", "reason": "used", "n_rows": 10},
            {"source_table": "patients", "outcome": "set aside", "reason": "unparseable date",
             "n_rows": n_bad, "first_file": "patients.csv", "first_row": 1},
        ]
    )  # fmt: skip
    found = misread_shares(study, {"patients": 10 + n_bad}, log)
    assert [(f.table, f.reason) for f in found] == (
        [("patients", "unparseable date")] if stops else []
    )
