"""Builds that would succeed but mislead are refused; profile counts orphans as the build does.

The fixtures are copies of the hand-made extract (tests/fixtures/handmade) with one thing made
wrong: dates written dd/mm/yyyy, patient ids of another type in the patients table, or every
patient of an unknown sex.
"""

from __future__ import annotations

import csv
import shutil
from collections.abc import Callable
from pathlib import Path

import pyarrow as pa
import pytest
from sqlglot import exp
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.compile._quality import SET_ASIDE_REASONS
from pipeline.config import load_study
from pipeline.errors import ConfigError, UnusableBuildError
from pipeline.extract.readers.fhir import READER_REASONS
from pipeline.outputs._usability import misread_shares
from pipeline.workflows.build import BuildOptions, build_study, plan_study
from pipeline.workflows.profile import profile_extract

from .conftest import DEMO_STUDY, HANDMADE
from .helpers import demo_study_variant

EVENT_TABLES = ("encounters", "diagnoses", "prescriptions", "measurements")
# Rows of patients missing from the hand-made patients table (HM-999 and the like); orphan is
# the first reason checked, so they stay orphans whatever else is wrong with them.
ORPHANS = {"encounters": 2, "diagnoses": 2, "prescriptions": 1, "measurements": 0}


def _data_rows(table: str) -> int:
    with (HANDMADE / f"{table}.csv").open(encoding="utf-8", newline="") as handle:
        return sum(1 for _ in csv.DictReader(handle))


def _copy_with(folder: Path, table: str, change: Callable[[dict[str, str]], None]) -> Path:
    """A copy of the hand-made extract with ``change`` applied to every row of ``table``."""
    extract = folder / "extract"
    shutil.copytree(HANDMADE, extract)
    path = extract / f"{table}.csv"
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


def _day_first(row: dict[str, str]) -> None:
    year, month, day = row["encounter_date"].split("-")
    row["encounter_date"] = f"{day}/{month}/{year}"


def _integer_ids(row: dict[str, str]) -> None:
    # HM-001 -> 1: the patients table's ids become canonical integers (BIGINT), the other
    # tables keep HM-001, which cannot be read as one.
    row["patient_id"] = str(int(row["patient_id"].removeprefix("HM-")))


def _outputs(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


def _quality(out: Path) -> dict[tuple[str, str], int]:
    with (out / "quality.csv").open(encoding="utf-8") as handle:
        return {(r["source_table"], r["reason"]): int(r["n_rows"]) for r in csv.DictReader(handle)}


# The classification of reasons.


def _reasons_in_plan() -> set[str]:
    """Every reason a stage of the demo plan can write into the quality log."""
    plan = plan_study(DEMO_STUDY)
    reasons: set[str] = set()
    for stage in plan.stages:
        for alias in stage.query.find_all(exp.Alias):
            if alias.alias != "reason" and not alias.alias.endswith("problem"):
                continue
            given = [alias.this] if isinstance(alias.this, exp.Literal) else []
            given += [case.args.get("true") for case in alias.find_all(exp.If)]
            given += [case.args.get("default") for case in alias.find_all(exp.Case)]
            reasons |= {g.this for g in given if isinstance(g, exp.Literal) and g.is_string}
    return {r for r in reasons if not r.startswith("used")}


def test_every_reason_of_the_quality_log_is_classified() -> None:
    found = _reasons_in_plan()
    assert "exact duplicate" in found  # the walk reaches the log's own literals
    assert "unit not convertible" in found  # and the measurements' judgement
    assert "unknown code system" in found  # and distinct_codes
    # and the reasons the FHIR reader gives in source_problem, before any stage
    assert found | set(READER_REASONS) == set(SET_ASIDE_REASONS)


def test_design_reasons_are_the_ones_the_issue_names() -> None:
    # From the issue: these follow from the study's design and never stop a build.
    design = {r for r, kind in SET_ASIDE_REASONS.items() if not kind.misread}
    assert design == {"after end of data", "after death", "unknown measure", "exact duplicate"} | {
        # FHIR statuses (issue 26): recorded as not having happened, whatever their share
        "entered in error",
        "refuted",
        "not taken",
        "cancelled",
    }
    assert all(kind.hint.strip() for kind in SET_ASIDE_REASONS.values())


def _log(reason: str, n_rows: int) -> pa.Table:
    return pa.Table.from_pylist(
        [
            {"source_table": "encounters", "outcome": "used", "reason": "used", "n_rows": 10},
            {"source_table": "encounters", "outcome": "set aside", "reason": reason,
             "n_rows": n_rows, "first_file": None, "first_row": None},
        ]
    )  # fmt: skip


@pytest.mark.parametrize(
    ("reason", "n_rows", "stops"),
    [
        ("unparseable date", 10, False),  # 50 %: the limit itself is allowed
        ("unparseable date", 11, True),  # 52.4 %
        ("orphan patient", 11, True),
        ("after end of data", 1000, False),  # design: never stops
        ("exact duplicate", 1000, False),
    ],
)
def test_share_against_the_limit(tmp_path: Path, reason: str, n_rows: int, *, stops: bool) -> None:
    study = load_study(demo_study_variant(tmp_path)).study
    found = misread_shares(study, {"encounters": 10 + n_rows}, _log(reason, n_rows))
    assert [(f.table, f.reason, f.rows) for f in found] == (
        [("encounters", reason, n_rows)] if stops else []
    )


# Misread data stops the build before anything is written.


def test_unreadable_dates_stop_the_build_and_keep_the_previous_output(tmp_path: Path) -> None:
    out = tmp_path / "out"
    build_study(DEMO_STUDY, BuildOptions(extract=HANDMADE, out=out))
    before = _outputs(out)
    extract = _copy_with(tmp_path, "encounters", _day_first)
    with pytest.raises(UnusableBuildError) as caught:
        build_study(DEMO_STUDY, BuildOptions(extract=extract, out=out))
    message = str(caught.value)
    n = _data_rows("encounters")
    unreadable = n - ORPHANS["encounters"]
    assert f'encounters: {unreadable:,} of {n:,} rows (99 %) set aside as "unparseable date"' in (
        message
    )
    assert "(first at encounters.csv row 1)" in message
    assert "limit of 50 %" in message
    assert 'dates: "%d/%m/%Y"' in message  # the fix
    assert "{table: encounters, reason: unparseable date}" in message  # the waiver
    assert _outputs(out) == before  # byte for byte, run.json included


def test_the_command_line_exits_2_naming_table_reason_count_and_row(tmp_path: Path) -> None:
    extract = _copy_with(tmp_path, "encounters", _day_first)
    out = tmp_path / "out"
    result = CliRunner().invoke(
        app, ["build", str(DEMO_STUDY), "--extract", str(extract), "--out", str(out), "--quiet"]
    )
    n = _data_rows("encounters")
    unreadable = n - ORPHANS["encounters"]
    assert result.exit_code == 2
    assert f'encounters: {unreadable:,} of {n:,} rows (99 %) set aside as "unparseable date"' in (
        result.output
    )
    assert "encounters.csv row 1" in result.output
    assert "Traceback" not in result.output
    assert not out.exists()


def test_ids_of_another_type_stop_the_build_as_orphans(tmp_path: Path) -> None:
    extract = _copy_with(tmp_path, "patients", _integer_ids)
    with pytest.raises(UnusableBuildError) as caught:
        build_study(DEMO_STUDY, BuildOptions(extract=extract, out=tmp_path / "out"))
    message = str(caught.value)
    for table in ("encounters", "diagnoses", "prescriptions"):
        n = _data_rows(table)
        assert f'{table}: {n:,} of {n:,} rows (100 %) set aside as "orphan patient"' in message
        assert f"(first at {table}.csv row 1)" in message
    assert "measurements" not in message  # it has no rows: nothing to judge
    assert "patient_id" in message


def test_accepting_a_table_and_reason_lets_the_build_through(tmp_path: Path) -> None:
    extract = _copy_with(tmp_path, "encounters", _day_first)
    accepted = "{accept_set_aside: [{table: encounters, reason: unparseable date}]}"
    study = demo_study_variant(
        tmp_path / "study", output="allow_empty_cohort: true", quality=accepted
    )
    result = build_study(study, BuildOptions(extract=extract, out=tmp_path / "out"))
    assert result.cohort_rows == 0
    n = _data_rows("encounters") - ORPHANS["encounters"]
    assert _quality(tmp_path / "out")[("encounters", "unparseable date")] == n


def test_a_higher_limit_lets_the_build_through(tmp_path: Path) -> None:
    extract = _copy_with(tmp_path, "patients", _integer_ids)
    study = demo_study_variant(
        tmp_path / "study", output="allow_empty_cohort: true", quality="{max_share_set_aside: 1}"
    )
    build_study(study, BuildOptions(extract=extract, out=tmp_path / "out"))
    assert _quality(tmp_path / "out")[("encounters", "orphan patient")] == _data_rows("encounters")


def test_rows_after_the_end_of_data_never_stop_a_build(tmp_path: Path) -> None:
    def later(row: dict[str, str]) -> None:
        row["event_date"] = "2020-" + row["event_date"][5:]  # every diagnosis in 2020

    extract = _copy_with(tmp_path, "diagnoses", later)
    result = build_study(DEMO_STUDY, BuildOptions(extract=extract, out=tmp_path / "out"))
    assert result.cohort_rows > 0
    malformed = 1  # one hand-made code is malformed, a reason checked before the date's
    n = _data_rows("diagnoses") - ORPHANS["diagnoses"] - malformed
    assert _quality(tmp_path / "out")[("diagnoses", "after end of data")] == n


# An empty cohort.


def _unknown_sex(row: dict[str, str]) -> None:
    row["sex"] = "X"


def test_an_empty_cohort_is_refused_naming_the_step(tmp_path: Path) -> None:
    extract = _copy_with(tmp_path, "patients", _unknown_sex)
    out = tmp_path / "out"
    with pytest.raises(UnusableBuildError) as caught:
        build_study(DEMO_STUDY, BuildOptions(extract=extract, out=out))
    n = _data_rows("patients") - 2  # two hand-made patients have no encounter in 2015-2016
    assert "step 'sex' (" in str(caught.value)
    assert f"removed the last {n:,} of {n:,} patients" in str(caught.value)
    assert not out.exists()


def test_a_study_may_allow_an_empty_cohort(tmp_path: Path) -> None:
    extract = _copy_with(tmp_path, "patients", _unknown_sex)
    study = demo_study_variant(tmp_path / "study", output="allow_empty_cohort: true")
    result = build_study(study, BuildOptions(extract=extract, out=tmp_path / "out"))
    assert result.cohort_rows == 0
    # Streamed from the engine, an empty cohort is still a file with every documented column.
    written = result.read("cohort")
    assert written.num_rows == 0
    assert written.column_names == [doc.column for doc in result.plan.columns]
    assert b"description" in (written.schema.field("patient_id").metadata or {})


# The study keys are validated where they are written.


@pytest.mark.parametrize(
    ("quality", "message"),
    [
        ("{max_share_set_aside: 1.5}", "quality.max_share_set_aside: Input should be less than"),
        ("{max_share_set_aside: -0.1}", "quality.max_share_set_aside: must be 0.0 or more"),
        (
            "{accept_set_aside: [{table: encounters, reason: unreadable date}]}",
            "unknown reason 'unreadable date'; reasons that can stop a build:",
        ),
        (
            "{accept_set_aside: [{table: encounters, reason: after death}]}",
            "'after death' follows from the study's design and never stops a build",
        ),
        (
            "{accept_set_aside: [{table: encounters, reason: unit not convertible}]}",
            "the quality log never sets encounters rows aside as 'unit not convertible'",
        ),
        (
            "{accept_set_aside: [{table: visits, reason: orphan patient}]}",
            "quality.accept_set_aside[0].table: Input should be 'patients'",
        ),
    ],
)
def test_bad_quality_settings_are_located(tmp_path: Path, quality: str, message: str) -> None:
    study = demo_study_variant(tmp_path, quality=quality)
    line = study.read_text(encoding="utf-8").splitlines().index(f"quality: {quality}") + 1
    with pytest.raises(ConfigError) as caught:
        load_study(study)
    (problem,) = caught.value.problems
    assert (problem.file, problem.line, problem.code) == (study, line, "bad-value")
    assert message in problem.message


def test_allow_empty_cohort_must_be_a_boolean(tmp_path: Path) -> None:
    study = demo_study_variant(tmp_path, output="allow_empty_cohort: sometimes")
    line = study.read_text(encoding="utf-8").splitlines().index("  allow_empty_cohort: sometimes")
    with pytest.raises(ConfigError) as caught:
        load_study(study)
    (problem,) = caught.value.problems
    assert (problem.line, problem.code) == (line + 1, "bad-value")
    assert "output.allow_empty_cohort" in problem.message


# Profile counts orphans as the build does.


def test_profile_counts_orphans_as_the_build_does_when_id_types_differ(tmp_path: Path) -> None:
    extract = _copy_with(tmp_path, "patients", _integer_ids)
    study = demo_study_variant(
        tmp_path / "study", output="allow_empty_cohort: true", quality="{max_share_set_aside: 1}"
    )
    build_study(study, BuildOptions(extract=extract, out=tmp_path / "out"))
    built = _quality(tmp_path / "out")
    profiled = profile_extract(extract)["tables"]
    for table in EVENT_TABLES:
        expected = built.get((table, "orphan patient"), 0)
        assert profiled[table]["orphan_rows"] == expected == _data_rows(table)


def test_profile_counts_rows_without_a_patient_id_as_orphans(tmp_path: Path) -> None:
    def no_id(row: dict[str, str]) -> None:
        if row["patient_id"] == "HM-001":
            row["patient_id"] = ""

    extract = _copy_with(tmp_path, "encounters", no_id)
    with (HANDMADE / "encounters.csv").open(encoding="utf-8", newline="") as handle:
        emptied = sum(1 for r in csv.DictReader(handle) if r["patient_id"] == "HM-001")
    emptied += ORPHANS["encounters"]
    build_study(DEMO_STUDY, BuildOptions(extract=extract, out=tmp_path / "out"))
    built = _quality(tmp_path / "out")[("encounters", "orphan patient")]
    assert profile_extract(extract)["tables"]["encounters"]["orphan_rows"] == built == emptied
