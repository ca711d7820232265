"""Matched controls from the source population, and sets opened by new users of a group.

The fixture is tests/fixtures/designs/matching_exposed/ (its README works out every set by
hand). The oracle below is the slow and obviously correct version of the source pool: for each
set it tests every patient of a random extract against the conditions one by one, ranks by
``hashlib.md5`` and fills the sets in order; the property tests run the plan's matching stages
(pool, sets, spells, candidates, limits, draws) on DuckDB over the same extract and compare,
and check the design's promises.
"""

from __future__ import annotations

import csv
import dataclasses
import datetime as dt
import functools
import hashlib
import importlib.util
import os
import shutil
import tempfile
from pathlib import Path

import duckdb
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline import BuildOptions, build_study, plan_study
from pipeline.compile._context import evidence_number, exposure_key
from pipeline.config import load_study
from pipeline.config._explain_study import explain_study
from pipeline.config._matching import Matching
from pipeline.errors import ConfigError
from pipeline.outputs._matched import matched_table
from pipeline.outputs.report._table_one import exposure_table_one_blocks
from pipeline.outputs.report._tables import flow_block
from pipeline.outputs.report._write import Study as ReportStudy
from pipeline.outputs.report._write import matched_group

from .helpers import require

FIXTURE = Path(__file__).parent / "fixtures" / "designs" / "matching_exposed"
DEFINITIONS = Path(__file__).resolve().parents[1] / "definitions"
EXAMPLE = DEFINITIONS / "studies" / "orvane_new_users_matched.yaml"


def _copy(tmp_path: Path, name: str, change: tuple[str, str] | None = None) -> Path:
    folder = tmp_path / "fixture"
    if not folder.exists():
        shutil.copytree(FIXTURE, folder)
    study = folder / name
    text = study.read_text(encoding="utf-8").replace("../../../../definitions", str(DEFINITIONS))
    if change is not None:
        assert change[0] in text
        text = text.replace(*change)
    study.write_text(text, encoding="utf-8")
    return study


def _build(tmp_path: Path, name: str, change: tuple[str, str] | None = None) -> Path:
    study = _copy(tmp_path, name, change)
    out = tmp_path / f"out_{study.stem}"
    build_study(study, BuildOptions(out=out))
    return out


def _rows(path: Path) -> list[dict[str, str]]:
    table = pq.read_table(path).to_pylist()
    return [{k: "" if v is None else str(v) for k, v in r.items()} for r in table]


def _expected(name: str) -> list[dict[str, str]]:
    with (FIXTURE / name).open(encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


@pytest.fixture(scope="module")
def exposed(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return _build(tmp_path_factory.mktemp("exposed"), "study.yaml")


@pytest.fixture(scope="module")
def cases(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return _build(tmp_path_factory.mktemp("cases"), "study_cases_source.yaml")


# --- the hand-computed fixture ----------------------------------------------------------------


def test_exposed_sets_match_the_hand_computed_table(exposed: Path) -> None:
    assert _rows(exposed / "matched.parquet") == _expected("expected_matched.csv")


def test_exposed_the_day_after_is_a_control_exposed_on_the_day_is_not(exposed: Path) -> None:
    rows = _rows(exposed / "matched.parquet")
    roles = {(r["patient_id"], r["role"], r["index_date"]) for r in rows}
    # XE-03 starts a sulfonylurea on 2016-03-02: a control of set 1 (2016-03-01), then exposed.
    assert ("XE-03", "control", "2016-03-01") in roles
    assert ("XE-03", "exposed", "2016-03-02") in roles
    # XE-04 starts the other group on set 1's date; XE-01 is exposed before set 2's date.
    assert "XE-04" not in {r["patient_id"] for r in rows}
    assert ("XE-01", "control", "2016-03-02") not in roles


def test_a_patient_registered_after_the_set_date_is_refused(exposed: Path) -> None:
    rows = _rows(exposed / "matched.parquet")
    # XE-06 registers on 2016-03-02: not for set 1 (2016-03-01), but for set 2 on that very day.
    assert [(r["set_id"], r["role"]) for r in rows if r["patient_id"] == "XE-06"] == [
        ("2", "control")
    ]
    # Dead (XE-09), deregistered (XE-10) and out of contact (XE-08) never appear.
    assert {"XE-08", "XE-09", "XE-10"}.isdisjoint(r["patient_id"] for r in rows)


def test_an_untreated_patient_with_the_outcome_is_no_control(exposed: Path) -> None:
    # XE-17 (F 1950, never treated, encounter 2016-02-01) has had heart failure since
    # 2014-02-10: untreated, registered and in contact, but not free of the study's outcome on
    # either set's date, so no control (the issue: "free of the outcome on the set's date").
    assert "XE-17" not in {r["patient_id"] for r in _rows(exposed / "matched.parquet")}


def test_controls_come_from_outside_the_cohort(exposed: Path) -> None:
    cohort = {str(p) for p in pq.read_table(exposed / "cohort.parquet")["patient_id"].to_pylist()}
    assert cohort == {"XE-01", "XE-03", "XE-04"}
    controls = {
        r["patient_id"] for r in _rows(exposed / "matched.parquet") if r["role"] != "exposed"
    }
    assert controls - cohort == {"XE-02", "XE-13", "XE-06"}


def test_exposed_attrition_lines(exposed: Path) -> None:
    with (exposed / "attrition.csv").open(encoding="utf-8") as handle:
        lines = [r for r in csv.DictReader(handle) if r["step"].startswith("match_")]
    assert [(r["step"], r["patients_before"], r["removed"], r["remaining"]) for r in lines] == [
        ("match_exposed", "3", "1", "2"),
        ("match_any_control", "2", "0", "2"),
        ("match_all_controls", "2", "1", "1"),
    ]


def test_the_dictionary_names_the_exposed_role(exposed: Path) -> None:
    with (exposed / "dictionary.csv").open(encoding="utf-8") as handle:
        docs = {r["column"]: r for r in csv.DictReader(handle)}
    names = pq.read_schema(exposed / "matched.parquet").names
    assert [c for c in docs if c.startswith("matched.")] == [f"matched.{n}" for n in names]
    assert "exposed" in docs["matched.role"]["meaning"]


def test_case_sets_from_the_source_population(cases: Path) -> None:
    assert _rows(cases / "matched.parquet") == _expected("expected_matched_cases_source.csv")
    cohort = {str(p) for p in pq.read_table(cases / "cohort.parquet")["patient_id"].to_pylist()}
    assert "XE-11" not in cohort  # practice P02: outside the cohort, inside the source population


def test_the_cohort_pool_leaves_the_outside_patient_out(tmp_path: Path) -> None:
    out = _build(
        tmp_path,
        "study_cases_source.yaml",
        ("controls_from: source_population", "controls_from: cohort"),
    )
    assert [r["patient_id"] for r in _rows(out / "matched.parquet")] == ["XE-14", "XE-15"]


def test_check_explain_states_the_pool() -> None:
    text = explain_study(load_study(EXAMPLE).study)
    assert "per new user of sulfonylurea in the cohort, from the source population" in text
    assert "no record of any exposure group on or before the new user's index date" in text


# --- located errors -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("name", "change", "code", "at"),
    [
        (
            "study.yaml",
            (
                "  exposed_in: sulfonylurea\n",
                "  exposed_in: sulfonylurea\n  cases_of: heart_failure\n",
            ),
            "matching-opener",
            "matching:",
        ),
        ("study.yaml", ("  exposed_in: sulfonylurea\n", ""), "matching-opener", "matching:"),
        (
            "study.yaml",
            ("exposed_in: sulfonylurea", "exposed_in: sglt2"),
            "unknown-exposure-group",
            "exposed_in: sglt2",
        ),
        (
            "study.yaml",
            (
                "  exposed_in: sulfonylurea\n",
                "  exposed_in: sulfonylurea\n  controls_from: cohort\n",
            ),
            "exposed-controls-pool",
            "controls_from: cohort",
        ),
        (
            "study_cases_source.yaml",
            ("cases_of: heart_failure", "exposed_in: sulfonylurea"),
            "exposed-without-exposure",
            "exposed_in: sulfonylurea",
        ),
        (
            "study_cases_source.yaml",
            ("controls_from: source_population", "controls_from: everyone"),
            "",
            "controls_from: everyone",
        ),
    ],
)
def test_a_bad_option_is_located(
    tmp_path: Path, name: str, change: tuple[str, str], code: str, at: str
) -> None:
    study = _copy(tmp_path, name, change)
    with pytest.raises(ConfigError) as err:
        build_study(study, BuildOptions(out=tmp_path / "out"))
    problem = err.value.problems[0]
    if code:
        assert problem.code == code
    assert at in study.read_text(encoding="utf-8").splitlines()[problem.line - 1]
    assert not (tmp_path / "out").exists()


# --- the oracle and the properties --------------------------------------------------------------

_DAY0 = dt.date(2016, 1, 1)
_GROUPS = ("sulfonylurea", "dpp4")


def _day(n: int | None) -> dt.date | None:
    return None if n is None else _DAY0 + dt.timedelta(days=n)


@dataclasses.dataclass(frozen=True)
class _Patient:
    patient_id: str
    sex: str
    birth_year: int
    practice_id: str
    registration_date: dt.date | None
    deregistration_date: dt.date | None
    death_date: dt.date | None
    records: tuple[tuple[str, dt.date], ...]  # (exposure group, date)
    contacts: tuple[dt.date, ...]
    in_cohort: bool
    onset: dt.date | None = None  # heart failure, for exposed sets (case sets: first record)

    @property
    def first_exposure(self) -> dt.date | None:
        return min((d for _, d in self.records), default=None)

    def opens(self, option: Matching) -> bool:
        """Opens a set: in the cohort as a new user of sulfonylurea only (one group on the
        first day), or, for case sets, in the cohort with an onset (its first record)."""
        first = self.first_exposure
        if option.exposed_in is None:
            return self.in_cohort and first is not None
        groups = {g for g, d in self.records if d == first}
        return self.in_cohort and groups == {"sulfonylurea"}


@st.composite
def _patients(draw: st.DrawFn) -> list[_Patient]:
    out = []
    for i in range(draw(st.integers(2, 14))):
        records = draw(
            st.lists(st.tuples(st.sampled_from(_GROUPS), st.integers(0, 20)), max_size=3)
        )
        out.append(
            _Patient(
                f"S{i:02d}",
                draw(st.sampled_from("FM")),
                draw(st.integers(1950, 1953)),
                draw(st.sampled_from(["A", "B"])),
                _day(draw(st.one_of(st.none(), st.integers(-5, 15)))),
                _day(draw(st.one_of(st.none(), st.integers(0, 25)))),
                _day(draw(st.one_of(st.none(), st.integers(0, 25)))),
                tuple(sorted({(g, _day(d)) for g, d in records})),
                tuple(sorted({_day(c) for c in draw(st.lists(st.integers(-10, 20), max_size=4))})),
                draw(st.booleans()),
                _day(draw(st.one_of(st.none(), st.integers(-5, 20)))),
            )
        )
    return out


# Sets opened by new users of sulfonylurea, or by heart failure cases with controls from the
# source population; for those, a patient's first record stands for the outcome's onset.
_SHARED = {
    "controls_per_case": st.integers(1, 3),
    "birth_year_within": st.integers(0, 2),
    "same_practice": st.booleans(),
    "reuse_controls": st.booleans(),
    "seed": st.integers(0, 1000),
    "contact_within_days": st.integers(0, 12),
}
_OPTIONS = st.one_of(
    st.builds(Matching, exposed_in=st.just("sulfonylurea"), **_SHARED),
    st.builds(
        Matching,
        cases_of=st.just("heart_failure"),
        controls_from=st.just("source_population"),
        **_SHARED,
    ),
)


def _eligible(option: Matching, opener: _Patient, other: _Patient) -> bool:
    """The source population's conditions, one by one, on the set's date."""
    day = opener.first_exposure
    assert day is not None
    first = other.first_exposure
    onset = other.onset if option.exposed_in is not None else None
    return (
        other.patient_id != opener.patient_id
        and other.sex == opener.sex
        and abs(other.birth_year - opener.birth_year) <= option.birth_year_within
        and (not option.same_practice or other.practice_id == opener.practice_id)
        and (other.registration_date is None or other.registration_date <= day)
        and (other.deregistration_date is None or other.deregistration_date >= day)
        and (other.death_date is None or other.death_date >= day)
        and (first is None or first > day)
        and (onset is None or onset > day)
        and any(
            day - dt.timedelta(days=option.contact_within_days) <= c <= day for c in other.contacts
        )
    )


def _oracle(people: list[_Patient], option: Matching) -> list[tuple[str, list[str]]]:
    openers = sorted(
        (p for p in people if p.opens(option)), key=lambda p: (p.first_exposure, p.patient_id)
    )
    taken: set[str] = set()
    sets = []
    for opener in openers:
        pool = [p.patient_id for p in people if _eligible(option, opener, p)]
        ranked = sorted(
            pool,
            key=lambda q: (
                hashlib.md5(f"{option.seed}|{opener.patient_id}|{q}".encode()).hexdigest(),
                q,
            ),
        )
        if not option.reuse_controls:
            ranked = [q for q in ranked if q not in taken]
        chosen = ranked[: option.controls_per_case]
        if not option.reuse_controls:
            taken.update(chosen)
        sets.append((opener.patient_id, chosen))
    return sets


@functools.cache
def _stages_sql(option: Matching) -> tuple[tuple[str, str], ...]:
    """The matching stages of the fixture's plan (exposed or case sets) compiled with ``option``."""
    name, k = ("study.yaml", 3) if option.exposed_in else ("study_cases_source.yaml", 2)
    text = (
        (FIXTURE / name)
        .read_text(encoding="utf-8")
        .replace("../../../../definitions", str(DEFINITIONS))
        .replace(f"controls_per_case: {k}", f"controls_per_case: {option.controls_per_case}")
        .replace("birth_year_within: 1", f"birth_year_within: {option.birth_year_within}")
        .replace("contact_within_days: 180", f"contact_within_days: {option.contact_within_days}")
        .replace(
            "  seed: 7\n",
            f"  seed: {option.seed}\n  same_practice: {str(option.same_practice).lower()}\n"
            f"  reuse_controls: {str(option.reuse_controls).lower()}\n",
        )
    )
    with tempfile.TemporaryDirectory() as folder:
        study = Path(folder) / "study.yaml"
        study.write_text(text, encoding="utf-8")
        plan = plan_study(study)
    names = [s.name for s in plan.stages if s.name.startswith("matching_")]
    return tuple((n, plan.stage(n).render("duckdb")) for n in names)


def _run_plan(people: list[_Patient], option: Matching) -> list[tuple[str, list[str]]]:
    """The plan's matching stages on DuckDB over the extract's tables, then the build's fill."""
    base = pa.table(
        {
            "patient_id": [p.patient_id for p in people],
            "sex": [p.sex for p in people],
            "birth_date": [dt.date(p.birth_year, 7, 1) for p in people],
            "practice_id": [p.practice_id for p in people],
            "registration_date": pa.array([p.registration_date for p in people], pa.date32()),
            "deregistration_date": pa.array([p.deregistration_date for p in people], pa.date32()),
            "death_date": pa.array([p.death_date for p in people], pa.date32()),
        }
    )
    numbers = {g: evidence_number(exposure_key(g)) for g in _GROUPS}
    events = pa.table(
        {
            "patient_id": [p.patient_id for p in people for _ in p.records],
            "evidence": pa.array([numbers[g] for p in people for g, _ in p.records], pa.int64()),
            "event_date": pa.array([d for p in people for _, d in p.records], pa.date32()),
        }
    )
    cohort = pa.table(
        {
            "patient_id": [p.patient_id for p in people if p.in_cohort],
            "sex": [p.sex for p in people if p.in_cohort],
            "index_date": pa.array([p.first_exposure for p in people if p.in_cohort], pa.date32()),
            "exposure": [
                "sulfonylurea" if p.opens(option) else "dpp4" for p in people if p.in_cohort
            ],
            "incident_heart_failure": [p.opens(option) for p in people if p.in_cohort],
            "onset_heart_failure": pa.array(
                [p.first_exposure for p in people if p.in_cohort], pa.date32()
            ),
        }
    )
    onsets = pa.table(
        {
            "patient_id": [p.patient_id for p in people],
            "onset_heart_failure": pa.array(
                [p.onset if option.exposed_in else p.first_exposure for p in people], pa.date32()
            ),
        }
    )
    encounters = pa.table(
        {
            "patient_id": [p.patient_id for p in people for _ in p.contacts],
            "encounter_date": pa.array([c for p in people for c in p.contacts], pa.date32()),
        }
    )
    con = duckdb.connect()
    for name, table in (
        ("patient_base", base),
        ("evidence_events", events),
        ("cohort", cohort),
        ("condition_onsets", onsets),
        ("encounter_rows", encounters),
    ):
        con.register(name, table)
    for name, sql in _stages_sql(option):
        con.execute(f"CREATE TABLE {name} AS {sql}")
    sets = con.sql("SELECT * FROM matching_sets ORDER BY set_id").to_arrow_table()
    draws = con.sql("SELECT * FROM matching_draws ORDER BY set_id, draw_rank").to_arrow_table()
    con.close()
    table, _ = matched_table(sets, draws, option, pa.string())
    out: list[tuple[str, list[str]]] = []
    for row in table.to_pylist():
        if row["role"] in ("exposed", "case"):
            out.append((row["patient_id"], []))
        else:
            out[-1][1].append(row["patient_id"])
    return out


def _person(pid: str, records: tuple[tuple[str, dt.date], ...], **kw: object) -> _Patient:
    fields: dict[str, object] = {
        "sex": "F",
        "birth_year": 1950,
        "practice_id": "A",
        "registration_date": None,
        "deregistration_date": None,
        "death_date": None,
        "contacts": (_day(1),),
        "in_cohort": False,
    }
    return _Patient(pid, records=records, **(fields | kw))  # type: ignore[arg-type]


def test_exposed_on_the_same_day_is_no_control() -> None:
    option = Matching(
        exposed_in="sulfonylurea", controls_per_case=2, seed=1, contact_within_days=10
    )
    day = _day(5)
    assert day is not None
    twins = [_person(f"P{i}", (("sulfonylurea", day),), in_cohort=True) for i in range(2)]
    assert _run_plan(twins, option) == _oracle(twins, option) == [("P0", []), ("P1", [])]
    # One day later the second is a control of the first; registered on the set's date counts.
    later = [
        twins[0],
        _person("P1", (("sulfonylurea", _day(6)),), in_cohort=True, registration_date=day),
    ]
    assert _run_plan(later, option) == _oracle(later, option) == [("P0", ["P1"]), ("P1", [])]


@pytest.mark.slow
@settings(max_examples=40, deadline=None)
@given(people=_patients(), option=_OPTIONS)
def test_plan_and_fill_agree_with_the_oracle(people: list[_Patient], option: Matching) -> None:
    got = _run_plan(people, option)
    assert got == _oracle(people, option)
    by_id = {p.patient_id: p for p in people}
    used = [c for _, controls in got for c in controls]
    for opener, controls in got:
        assert all(_eligible(option, by_id[opener], by_id[c]) for c in controls)
    if not option.reuse_controls:
        assert len(used) == len(set(used))
    assert _run_plan(people, option) == got  # same seed, same sets


@pytest.mark.slow
@settings(max_examples=30, deadline=None)
@given(people=_patients(), option=_OPTIONS, data=st.data())
def test_an_exclusion_never_grows_the_sets(
    people: list[_Patient], option: Matching, data: st.DataObject
) -> None:
    # An exclusion takes a patient out of the cohort (no set); the source population keeps them.
    removed = data.draw(st.sampled_from([p.patient_id for p in people]))
    before = _run_plan(people, option)
    after = _run_plan(
        [dataclasses.replace(p, in_cohort=False) if p.patient_id == removed else p for p in people],
        option,
    )
    assert len(after) <= len(before)
    assert sum(len(c) for _, c in after) <= sum(len(c) for _, c in before)
    if option.reuse_controls:
        sizes = dict(before)
        assert all(c == sizes[opener] for opener, c in after)


# --- both engines draw the same sets ----------------------------------------------------------


@pytest.mark.spark
@pytest.mark.slow
def test_spark_writes_the_same_files_for_the_exposed_example(tmp_path: Path) -> None:
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
    matched = pq.read_table(outs["duckdb"] / "matched.parquet")
    assert matched.num_rows > 100
    for name in ("matched.parquet", "attrition.csv", "dictionary.csv", "cohort.parquet"):
        assert (outs["spark"] / name).read_bytes() == (outs["duckdb"] / name).read_bytes(), name


# --- the report ties the exposed sets line to Table 1 by exposure -----------------------------


def test_the_report_ties_the_exposed_sets_to_the_group_size(exposed: Path) -> None:
    attrition = pl.read_csv(exposed / "attrition.csv", infer_schema_length=0).with_columns(
        pl.col(c).cast(pl.Int64) for c in ("patients_before", "removed", "remaining")
    )
    cohort = pl.read_parquet(exposed / "cohort.parquet")
    # Without the study file, the group is read from matched.parquet's exposed patients.
    unread = ReportStudy(name="x", title="x", threshold=5, outcomes=(), titles={})
    assert matched_group(exposed, cohort, unread) == "sulfonylurea"
    flow = flow_block(attrition, cohort.height, None, exposed_in="sulfonylurea")
    keys = dict(zip(flow.frame["step"], flow.frame["remaining#key"], strict=True))
    assert keys["match_exposed"] == "t1size|@exposure|sulfonylurea"
    _, _, size_block = exposure_table_one_blocks(cohort)
    assert size_block.values()["t1size|@exposure|sulfonylurea"] == 2
    assert flow.values()["t1size|@exposure|sulfonylurea"] == 2
