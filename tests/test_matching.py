"""Matched controls (``matching:``): the hand-computed fixture, an oracle, located errors.

The fixture is tests/fixtures/designs/matching/ (its README works out every set by hand). The
oracle below is the slow and obviously correct version: for each set it tests every patient of
a random pool against the conditions one by one, ranks by ``hashlib.md5`` and fills the sets in
order; the property tests run the plan's matching stages on DuckDB over the same pool and
compare, and check the design's promises (every control eligible on its set's date, none
reused without replacement, the same seed the same sets, an exclusion never grows the sets).
"""

from __future__ import annotations

import csv
import dataclasses
import datetime as dt
import functools
import hashlib
import importlib.util
import json
import os
import shutil
import tempfile
from pathlib import Path

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from pipeline import BuildOptions, build_study, plan_study
from pipeline.cli import app
from pipeline.config._matching import Matching
from pipeline.errors import ConfigError
from pipeline.outputs._matched import matched_table

from .helpers import require

FIXTURE = Path(__file__).parent / "fixtures" / "designs" / "matching"
DEFINITIONS = Path(__file__).resolve().parents[1] / "definitions"


def _copy_fixture(tmp_path: Path, change: tuple[str, str] | None = None) -> Path:
    folder = tmp_path / "matching"
    shutil.copytree(FIXTURE, folder)
    study = folder / "study.yaml"
    text = study.read_text(encoding="utf-8").replace("../../../../definitions", str(DEFINITIONS))
    if change is not None:
        assert change[0] in text
        text = text.replace(*change)
    study.write_text(text, encoding="utf-8")
    return study


def _built(tmp_path: Path, change: tuple[str, str] | None = None) -> Path:
    study = _copy_fixture(tmp_path, change)
    out = tmp_path / "out"
    build_study(study, BuildOptions(out=out))
    return out


def _text(value: object) -> str:
    return "" if value is None else str(value)


def _rows(path: Path) -> list[dict[str, str]]:
    return [{k: _text(v) for k, v in r.items()} for r in pq.read_table(path).to_pylist()]


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return _built(tmp_path_factory.mktemp("matching"))


# --- the hand-computed fixture ----------------------------------------------------------------


def test_sets_match_the_hand_computed_table(built: Path) -> None:
    with (FIXTURE / "expected_matched.csv").open(encoding="utf-8") as handle:
        expected = list(csv.DictReader(handle))
    assert _rows(built / "matched.parquet") == expected


def test_a_control_may_become_a_case_the_next_day(built: Path) -> None:
    rows = _rows(built / "matched.parquet")
    roles = {(r["patient_id"], r["role"], r["index_date"]) for r in rows}
    assert ("MC-03", "control", "2016-03-01") in roles
    assert ("MC-03", "case", "2016-03-02") in roles
    # MC-04's follow-up still runs on 2016-03-01, but its last contact is 199 days before.
    assert "MC-04" not in {r["patient_id"] for r in rows}


def test_attrition_counts_sets_with_all_fewer_and_no_controls(built: Path) -> None:
    with (built / "attrition.csv").open(encoding="utf-8") as handle:
        lines = [r for r in csv.DictReader(handle) if r["step"].startswith("match_")]
    assert [(r["step"], r["patients_before"], r["removed"], r["remaining"]) for r in lines] == [
        ("match_cases", "11", "8", "3"),
        ("match_any_control", "3", "1", "2"),
        ("match_all_controls", "2", "1", "1"),
    ]
    counts = json.loads((built / "run.json").read_text(encoding="utf-8"))["counts"]
    assert counts["matching"] == {
        "cases": 3,
        "full": 1,
        "fewer": 1,
        "none": 1,
        "controls": 3,
        "distinct_controls": 3,
    }


def test_the_build_summary_prints_the_matching_lines(tmp_path: Path) -> None:
    # The terminal summary prints the log as written: the hand-computed matching lines follow
    # the eligibility steps, as in attrition.csv, before the cohort line.
    study = _copy_fixture(tmp_path)
    result = CliRunner().invoke(app, ["build", str(study), "--out", str(tmp_path / "out")])
    assert result.exit_code == 0, result.output
    printed = [line.split() for line in result.output.splitlines()]
    steps = [words[0] for words in printed if "remaining" in words]
    with (tmp_path / "out" / "attrition.csv").open(encoding="utf-8") as handle:
        assert steps == [r["step"] for r in csv.DictReader(handle)]
    assert [words for words in printed if words[0].startswith("match_")] == [
        ["match_cases", "removed", "8", "remaining", "3"],
        ["match_any_control", "removed", "1", "remaining", "2"],
        ["match_all_controls", "removed", "1", "remaining", "1"],
    ]


def test_dictionary_and_manifest_describe_the_file(built: Path) -> None:
    names = pq.read_schema(built / "matched.parquet").names
    with (built / "dictionary.csv").open(encoding="utf-8") as handle:
        documented = [r["column"] for r in csv.DictReader(handle)]
    assert [c for c in documented if c.startswith("matched.")] == [f"matched.{n}" for n in names]
    assert "# Data dictionary of matched.parquet" in (built / "dictionary.md").read_text()
    manifest = json.loads((built / "manifest.json").read_text(encoding="utf-8"))
    assert "matched.parquet" in manifest["outputs"]
    assert manifest["rows"]["matched"] == 6
    schema = pq.read_schema(built / "matched.parquet")
    assert (
        schema.field("patient_id").type
        == pq.read_schema(built / "cohort.parquet").field("patient_id").type
    )


def test_same_practice_leaves_the_other_practice_out(tmp_path: Path) -> None:
    out = _built(tmp_path, ("  seed: 7\n", "  seed: 7\n  same_practice: true\n"))
    first = [r for r in _rows(out / "matched.parquet") if r["set_id"] == "1"]
    assert [(r["patient_id"], r["practice_id"]) for r in first] == [
        ("MC-01", "P01"),
        ("MC-03", "P01"),
        ("MC-02", "P01"),
    ]


def test_a_study_without_the_option_writes_no_file(tmp_path: Path) -> None:
    study = _copy_fixture(tmp_path)
    text = study.read_text(encoding="utf-8")
    study.write_text(text[: text.index("matching:")] + text[text.index("output:") :])
    build_study(study, BuildOptions(out=tmp_path / "out"))
    assert not (tmp_path / "out" / "matched.parquet").exists()
    assert not any(s.name.startswith("matching") for s in plan_study(study).stages)


def test_an_unknown_outcome_is_located(tmp_path: Path) -> None:
    study = _copy_fixture(tmp_path, ("cases_of: heart_failure", "cases_of: type2_diabetes"))
    with pytest.raises(ConfigError) as err:
        build_study(study, BuildOptions(out=tmp_path / "out"))
    problem = err.value.problems[0]
    assert problem.code == "unknown-outcome"
    text = study.read_text(encoding="utf-8").splitlines()
    assert "cases_of: type2_diabetes" in text[problem.line - 1]
    assert not (tmp_path / "out").exists()


def test_a_bad_value_is_located(tmp_path: Path) -> None:
    study = _copy_fixture(tmp_path, ("controls_per_case: 2", "controls_per_case: 0"))
    with pytest.raises(ConfigError) as err:
        build_study(study, BuildOptions(out=tmp_path / "out"))
    problem = err.value.problems[0]
    assert "controls_per_case" in study.read_text(encoding="utf-8").splitlines()[problem.line - 1]


# --- the oracle and the properties --------------------------------------------------------------

_DAY0 = dt.date(2015, 1, 1)


@dataclasses.dataclass(frozen=True)
class _Person:
    patient_id: str
    sex: str
    birth_year: int
    practice_id: str
    index_date: dt.date
    followup_end: dt.date
    death_date: dt.date | None
    deregistration_date: dt.date | None
    at_risk: bool
    onset: dt.date | None
    contacts: tuple[dt.date, ...]

    @property
    def incident(self) -> bool:
        return (
            self.at_risk
            and self.onset is not None
            and self.index_date < self.onset <= self.followup_end
        )


def _day(n: int) -> dt.date:
    return _DAY0 + dt.timedelta(days=n)


@st.composite
def _people(draw: st.DrawFn) -> list[_Person]:
    people = []
    for i in range(draw(st.integers(2, 14))):
        # Few distinct days, so ties (an onset on another set's date, a contact on the first
        # day of the window) are common.
        index = draw(st.integers(0, 10))
        end = index + draw(st.integers(0, 30))
        onset = draw(st.one_of(st.none(), st.integers(index - 3, end + 3)))
        death = draw(st.one_of(st.none(), st.integers(index, end + 5)))
        dereg = draw(st.one_of(st.none(), st.integers(index, end + 5)))
        contacts = draw(st.lists(st.integers(index - 10, end), max_size=5))
        people.append(
            _Person(
                f"P{i:02d}",
                draw(st.sampled_from("FM")),
                draw(st.integers(1950, 1953)),
                draw(st.sampled_from(["A", "B"])),
                _day(index),
                _day(end),
                None if death is None else _day(death),
                None if dereg is None else _day(dereg),
                onset is None or onset > index,
                None if onset is None else _day(onset),
                tuple(sorted({_day(c) for c in contacts})),
            )
        )
    return people


_OPTIONS = st.builds(
    Matching,
    cases_of=st.just("hf"),
    controls_per_case=st.integers(1, 3),
    birth_year_within=st.integers(0, 2),
    same_practice=st.booleans(),
    reuse_controls=st.booleans(),
    seed=st.integers(0, 1000),
    contact_within_days=st.integers(0, 12),
)


def _eligible(option: Matching, case: _Person, other: _Person) -> bool:
    """The issue's conditions, one by one, on the set's date (the case's onset)."""
    day = case.onset
    assert day is not None
    return (
        other.patient_id != case.patient_id
        and other.sex == case.sex
        and abs(other.birth_year - case.birth_year) <= option.birth_year_within
        and (not option.same_practice or other.practice_id == case.practice_id)
        and other.index_date < day <= other.followup_end
        and other.at_risk
        and (other.onset is None or other.onset > day)
        and (other.death_date is None or other.death_date >= day)
        and (other.deregistration_date is None or other.deregistration_date >= day)
        and any(
            day - dt.timedelta(days=option.contact_within_days) <= c <= day for c in other.contacts
        )
    )


def _oracle(people: list[_Person], option: Matching) -> list[tuple[str, list[str]]]:
    """Each set (by date, then case id) as its case and its controls, the slow way."""
    cases = sorted((p for p in people if p.incident), key=lambda p: (p.onset, p.patient_id))
    taken: set[str] = set()
    sets = []
    for case in cases:
        pool = [p.patient_id for p in people if _eligible(option, case, p)]
        ranked = sorted(
            pool,
            key=lambda q: (
                hashlib.md5(f"{option.seed}|{case.patient_id}|{q}".encode()).hexdigest(),
                q,
            ),
        )
        if not option.reuse_controls:
            ranked = [q for q in ranked if q not in taken]
        chosen = ranked[: option.controls_per_case]
        if not option.reuse_controls:
            taken.update(chosen)
        sets.append((case.patient_id, chosen))
    return sets


@functools.cache
def _stages_sql(option: Matching) -> tuple[tuple[str, str], ...]:
    """The matching stages of the fixture's plan compiled with ``option``, as DuckDB SQL."""
    key = (
        "  seed: 7\n",
        f"  seed: {option.seed}\n  same_practice: {str(option.same_practice).lower()}\n"
        f"  reuse_controls: {str(option.reuse_controls).lower()}\n",
    )
    text = (
        (FIXTURE / "study.yaml")
        .read_text(encoding="utf-8")
        .replace("../../../../definitions", str(DEFINITIONS))
        .replace("controls_per_case: 2", f"controls_per_case: {option.controls_per_case}")
        .replace("birth_year_within: 1", f"birth_year_within: {option.birth_year_within}")
        .replace("contact_within_days: 180", f"contact_within_days: {option.contact_within_days}")
        .replace(*key)
    )
    with tempfile.TemporaryDirectory() as folder:
        study = Path(folder) / "study.yaml"
        study.write_text(text, encoding="utf-8")
        plan = plan_study(study)
    names = [
        s.name for s in plan.stages if s.name.startswith("matching_") and s.name != "matching_pool"
    ]
    return tuple((n, plan.stage(n).render("duckdb")) for n in names)


def _run_plan(people: list[_Person], option: Matching) -> list[tuple[str, list[str]]]:
    """The plan's matching stages on DuckDB over the pool, then the build's fill."""
    pool = pa.table(
        {
            "patient_id": [p.patient_id for p in people],
            "sex": [p.sex for p in people],
            "birth_year": pa.array([p.birth_year for p in people], pa.int32()),
            "practice_id": [p.practice_id for p in people],
            "index_date": [p.index_date for p in people],
            "followup_end": [p.followup_end for p in people],
            "death_date": pa.array([p.death_date for p in people], pa.date32()),
            "deregistration_date": pa.array([p.deregistration_date for p in people], pa.date32()),
            "at_risk": [p.at_risk for p in people],
            "incident": [p.incident for p in people],
            "onset": pa.array([p.onset for p in people], pa.date32()),
        }
    )
    encounters = pa.table(
        {
            "patient_id": [p.patient_id for p in people for _ in p.contacts],
            "encounter_date": pa.array([c for p in people for c in p.contacts], pa.date32()),
        }
    )
    con = duckdb.connect()
    con.register("matching_pool", pool)
    con.register("encounter_rows", encounters)
    for name, sql in _stages_sql(option):
        con.execute(f"CREATE TABLE {name} AS {sql}")
    sets = con.sql("SELECT * FROM matching_sets ORDER BY set_id").to_arrow_table()
    draws = con.sql("SELECT * FROM matching_draws ORDER BY set_id, draw_rank").to_arrow_table()
    con.close()
    table, _ = matched_table(sets, draws, option, pa.string())
    out: list[tuple[str, list[str]]] = []
    for row in table.to_pylist():
        if row["role"] == "case":
            out.append((row["patient_id"], []))
        else:
            out[-1][1].append(row["patient_id"])
    return out


def test_a_case_of_the_same_day_is_no_control() -> None:
    # Two cases with one onset day: neither is free of the outcome on the other's set date.
    option = Matching(cases_of="hf", controls_per_case=2, seed=1, contact_within_days=10)
    twins = [
        _Person(f"P{i}", "F", 1950, "A", _day(0), _day(30), None, None, True, _day(5), (_day(3),))
        for i in range(2)
    ]
    assert _run_plan(twins, option) == _oracle(twins, option) == [("P0", []), ("P1", [])]
    # One day later, the second is a control of the first (it may become a case later).
    later = [twins[0], dataclasses.replace(twins[1], onset=_day(6))]
    assert _run_plan(later, option) == _oracle(later, option) == [("P0", ["P1"]), ("P1", [])]


@pytest.mark.slow
@settings(max_examples=40, deadline=None)
@given(people=_people(), option=_OPTIONS)
def test_plan_and_fill_agree_with_the_oracle(people: list[_Person], option: Matching) -> None:
    got = _run_plan(people, option)
    assert got == _oracle(people, option)
    by_id = {p.patient_id: p for p in people}
    used = [c for _, controls in got for c in controls]
    for case, controls in got:
        assert all(_eligible(option, by_id[case], by_id[c]) for c in controls)
    if not option.reuse_controls:
        assert len(used) == len(set(used))
    assert _run_plan(people, option) == got  # same seed, same sets


@pytest.mark.slow
@settings(max_examples=40, deadline=None)
@given(people=_people(), option=_OPTIONS, data=st.data())
def test_an_exclusion_never_grows_the_sets(
    people: list[_Person], option: Matching, data: st.DataObject
) -> None:
    # An exclusion removes patients from the cohort: as cases and as candidates.
    removed = data.draw(st.sampled_from([p.patient_id for p in people]))
    before = _run_plan(people, option)
    after = _run_plan([p for p in people if p.patient_id != removed], option)
    assert len(after) <= len(before)
    assert sum(len(c) for _, c in after) <= sum(len(c) for _, c in before)
    if option.reuse_controls:
        # With replacement each set is drawn on its own: none of the remaining sets grows.
        sizes = {case: len(c) for case, c in before}
        assert all(len(c) <= sizes[case] for case, c in after)


# --- both engines draw the same sets ----------------------------------------------------------


@pytest.mark.spark
@pytest.mark.slow
def test_spark_writes_the_same_matched_file_on_the_synthetic_extract(tmp_path: Path) -> None:
    require(importlib.util.find_spec("pyspark"), "pyspark is not installed (ascertain[spark])")
    require(
        shutil.which("java") or os.environ.get("JAVA_HOME"),
        "no Java runtime for Spark (install a JDK 17)",
    )
    study = DEFINITIONS / "studies" / "orvane_hf_matched.yaml"
    outs = {}
    for engine in ("duckdb", "spark"):
        outs[engine] = tmp_path / engine
        master = "local[2]" if engine == "spark" else None
        build_study(study, BuildOptions(out=outs[engine], engine=engine, spark_master=master))
    matched = pq.read_table(outs["duckdb"] / "matched.parquet")
    assert matched.num_rows > 100
    for name in ("matched.parquet", "attrition.csv", "dictionary.csv", "cohort.parquet"):
        assert (outs["spark"] / name).read_bytes() == (outs["duckdb"] / name).read_bytes(), name
