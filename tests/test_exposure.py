"""New users of exposure groups (``exposure:``): located errors, the example study, both engines.

The hand-computed fixture is tests/fixtures/designs/new_users/ (built by tests/test_designs.py;
its README works out every patient: washout boundary, two groups on one day, a switcher).
"""

from __future__ import annotations

import csv
import importlib.util
import json
import os
import shutil
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from pipeline import BuildOptions, build_study, explain_patient, plan_study
from pipeline.config import load_study
from pipeline.config._explain_study import explain_study
from pipeline.errors import ConfigError
from pipeline.outputs.report import write_report

from .helpers import require

FIXTURE = Path(__file__).parent / "fixtures" / "designs" / "new_users"
DEFINITIONS = Path(__file__).resolve().parents[1] / "definitions"
EXAMPLE = DEFINITIONS / "studies" / "orvane_new_users.yaml"


def _study(tmp_path: Path, old: str, new: str) -> Path:
    folder = tmp_path / "new_users"
    shutil.copytree(FIXTURE, folder)
    study = folder / "study.yaml"
    text = study.read_text(encoding="utf-8").replace("../../../../definitions", str(DEFINITIONS))
    assert old in text
    study.write_text(text.replace(old, new), encoding="utf-8")
    return study


def _problem(study: Path) -> tuple[str, str]:
    """The first problem's code and the study line it points at."""
    with pytest.raises(ConfigError) as err:
        load_study(study)
    problem = err.value.problems[0]
    return problem.code, study.read_text(encoding="utf-8").splitlines()[problem.line - 1]


def test_an_exposure_start_without_groups_is_located(tmp_path: Path) -> None:
    text = FIXTURE.joinpath("study.yaml").read_text(encoding="utf-8")
    section = text[text.index("exposure:\n") : text.index("eligibility:")]
    code, line = _problem(_study(tmp_path, section, ""))
    assert code == "missing-exposure"
    assert "exposure_start" in line


def test_groups_with_another_index_are_located(tmp_path: Path) -> None:
    study = _study(
        tmp_path,
        "  exposure_start:\n    between: [2016-01-01, 2017-12-31]",
        "  first_encounter:\n    between: [2016-01-01, 2017-12-31]",
    )
    code, line = _problem(study)
    assert code == "exposure-index"
    assert line.startswith("exposure:")


def test_a_covariate_named_exposure_is_refused(tmp_path: Path) -> None:
    study = _study(tmp_path, "outcomes:", "covariates:\n  exposure: {condition: ckd}\n\noutcomes:")
    code, line = _problem(study)
    assert code == "duplicate-column"
    assert "exposure:" in line


def test_a_covariate_named_as_an_as_treated_column_is_refused(tmp_path: Path) -> None:
    study = _study(
        tmp_path, "outcomes:", "covariates:\n  end_reason_as_treated: {condition: ckd}\n\noutcomes:"
    )
    code, line = _problem(study)
    assert code == "duplicate-column"
    assert "end_reason_as_treated:" in line


def test_a_measurement_group_is_refused_at_its_line(tmp_path: Path) -> None:
    study = _study(
        tmp_path,
        "dpp4: {prescription: {atc: [A10BH]}}",
        "dpp4: {measurement: {measure: hba1c, at_least: 6.5 %}}",
    )
    _, line = _problem(study)
    assert "groups:" in line or "dpp4" in line


def test_a_code_list_in_a_group_is_refused(tmp_path: Path) -> None:
    study = _study(
        tmp_path, "{prescription: {atc: [A10BH]}}", "{prescription: {lists: [dpp4.csv]}}"
    )
    code, line = _problem(study)
    assert code == "list-in-study"
    assert "dpp4" in line


def _text(value: object) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    return "" if value is None else str(value)


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Path:
    tmp_path = tmp_path_factory.mktemp("episodes")
    study = _study(tmp_path, "washout_days: 365", "washout_days: 365")
    out = tmp_path / "out"
    build_study(study, BuildOptions(out=out))
    return out


def test_episodes_match_the_hand_computed_table(built: Path) -> None:
    with (FIXTURE / "expected_episodes.csv").open(encoding="utf-8") as handle:
        expected = list(csv.DictReader(handle))
    got = [
        {k: _text(v) for k, v in row.items()}
        for row in pq.read_table(built / "episodes.parquet").to_pylist()
    ]
    assert got == expected


def test_as_treated_follow_up_matches_the_hand_computed_table(built: Path) -> None:
    with (FIXTURE / "expected_as_treated.csv").open(encoding="utf-8") as handle:
        expected = list(csv.DictReader(handle))
    cohort = pq.read_table(built / "cohort.parquet", columns=list(expected[0])).to_pylist()
    assert [{k: _text(v) for k, v in row.items()} for row in cohort] == expected


def test_as_treated_columns_come_last_and_are_documented(built: Path) -> None:
    names = pq.read_schema(built / "cohort.parquet").names
    assert names[names.index("end_reason") + 1 :] == [
        "followup_end_as_treated",
        "followup_days_as_treated",
        "end_reason_as_treated",
        "incident_heart_failure_as_treated",
        "time_heart_failure_as_treated",
        "event_heart_failure_as_treated",
    ]
    dictionary = (built / "dictionary.csv").read_text(encoding="utf-8")
    assert all(f"\n{name}," in dictionary for name in names)


def test_as_treated_needs_episodes(tmp_path: Path) -> None:
    study = _study(
        tmp_path, "  episodes:\n    grace_days: 30\n    cover_without_stop_days: 30\n", ""
    )
    with pytest.raises(ConfigError) as err:
        load_study(study)
    assert "as_treated" in err.value.problems[0].message


def test_episodes_are_documented_and_listed(built: Path) -> None:
    dictionary = (built / "dictionary.csv").read_text(encoding="utf-8")
    for column in ("exposure", "episode_number", "episode_start", "episode_end", "prescriptions"):
        assert f"\nepisodes.{column}," in dictionary
    assert "# Data dictionary of episodes.parquet" in (built / "dictionary.md").read_text("utf-8")
    manifest = json.loads((built / "manifest.json").read_text(encoding="utf-8"))
    assert "episodes.parquet" in manifest["outputs"]
    assert manifest["rows"]["episodes"] == 8


def test_without_episodes_no_file_is_written(tmp_path: Path) -> None:
    study = _study(
        tmp_path,
        "  episodes:\n    grace_days: 30\n    cover_without_stop_days: 30\n  as_treated: true\n",
        "",
    )
    build_study(study, BuildOptions(out=tmp_path / "out"))
    assert not (tmp_path / "out" / "episodes.parquet").exists()
    assert not any(s.name == "episodes" for s in plan_study(study).stages)


def test_a_group_that_matches_no_row_is_warned_of(tmp_path: Path) -> None:
    study = _study(
        tmp_path, "dpp4: {prescription: {atc: [A10BH]}}", "dpp4: {prescription: {atc: [A10BX]}}"
    )
    result = build_study(study, BuildOptions(out=tmp_path / "out"))
    assert [w for w in result.warnings if "exposure group 'dpp4'" in w]
    assert not [w for w in result.warnings if "exposure group 'sglt2'" in w]


def test_explain_names_the_groups_and_the_new_user_steps(tmp_path: Path) -> None:
    study = _study(tmp_path, "washout_days: 365", "washout_days: 365")
    missing = explain_patient(study, "NU-06")
    assert "no record of an exposure group (sglt2, dpp4)" in str(
        missing["not_in_source_population"]
    )
    prevalent = explain_patient(study, "NU-02")
    steps = {s["step"]: s["passed"] for s in prevalent["eligibility"]}
    assert steps["new_user"] is False
    assert steps["one_exposure_group"] is True


def test_check_explain_states_the_design() -> None:
    text = explain_study(load_study(EXAMPLE).study)
    assert "record of any group on the 365 days before index excludes a patient (new_user)" in text
    assert "at most 30 uncovered days apart" in text
    assert "*_as_treated columns" in text


def test_the_cohort_has_the_exposure_column_after_sex() -> None:
    plan = plan_study(EXAMPLE)
    columns = [doc.column for doc in plan.columns]
    assert columns[columns.index("sex") + 1] == "exposure"
    index = next(s for s in plan.stages if s.name == "index_dates")
    assert "exposure_washout_records" in index.render("duckdb")


@pytest.mark.spark
@pytest.mark.slow
def test_spark_writes_the_same_files_for_the_example_study(tmp_path: Path) -> None:
    require(importlib.util.find_spec("pyspark"), "pyspark is not installed (ascertain[spark])")
    require(
        shutil.which("java") or os.environ.get("JAVA_HOME"),
        "no Java runtime for Spark (install a JDK 17)",
    )
    outs = {}
    for engine in ("duckdb", "spark"):
        outs[engine] = tmp_path / engine
        master = "local[2]" if engine == "spark" else None
        build_study(EXAMPLE, BuildOptions(out=outs[engine], engine=engine, spark_master=master))
    names = ("cohort.parquet", "population.parquet", "attrition.csv", "dictionary.csv")
    for name in (*names, "episodes.parquet"):
        assert (outs["spark"] / name).read_bytes() == (outs["duckdb"] / name).read_bytes(), name


def test_the_report_has_table_one_by_exposure_group(built: Path) -> None:
    # the fixture's cohort (expected_cohort.csv): 3 dpp4 (NU-05, NU-10, NU-12) and 3 sglt2
    # (NU-01, NU-03, NU-13); every group is below the threshold of 5, so hidden
    write_report(built)
    text = (built / "summary" / "table_one_by_exposure.csv").read_text(encoding="utf-8")
    rows = list(csv.DictReader(text.splitlines()))
    patients = {r["group"]: r["n"] for r in rows if r["variable"] == "patients"}
    assert patients == {"overall": "6", "exposure=dpp4": "<5", "exposure=sglt2": "<5"}
    assert {r["by"] for r in rows} == {"exposure"}
    page = (built / "report.html").read_text(encoding="utf-8")
    assert "<h3>By exposure group</h3>" in page
    assert "New users: no treatment in the washout" in page  # the flow's words for the step
