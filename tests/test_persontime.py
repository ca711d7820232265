"""Person-time (``persontime.parquet``): hand-computed cells, an oracle, the accounting check.

The hand-made fixture is tests/fixtures/designs/persontime/ (its README computes every cell);
the oracle below walks follow-up day by day, the slow and obviously correct way, and the
property test compares it with the stage's SQL on random spans.
"""

from __future__ import annotations

import csv
import dataclasses
import datetime as dt
import importlib.util
import json
import os
import shutil
from pathlib import Path
from typing import Any

import duckdb
import pyarrow.parquet as pq
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from sqlglot import exp

from pipeline.compile._persontime import cells_query
from pipeline.compile._sql import add_days
from pipeline.config import load_study
from pipeline.config._persontime import PersonTime
from pipeline.engine import DuckDBEngine
from pipeline.errors import ConfigError, EngineError
from pipeline.extract import discover_extract
from pipeline.workflows.build import BuildOptions, build_study, plan_study

from .helpers import require

FIXTURE = Path(__file__).parent / "fixtures" / "designs" / "persontime"
DEFINITIONS = Path(__file__).resolve().parents[1] / "definitions"


def _copy_fixture(tmp_path: Path, study_text: str | None = None) -> Path:
    folder = tmp_path / "persontime"
    shutil.copytree(FIXTURE, folder)
    study = folder / "study.yaml"
    text = study_text if study_text is not None else study.read_text(encoding="utf-8")
    study.write_text(text.replace("../../../../definitions", str(DEFINITIONS)), encoding="utf-8")
    return study


def _text(value: object) -> str:
    return "" if value is None else str(value)


def _rows(path: Path) -> list[dict[str, str]]:
    table = pq.read_table(path)
    return [{k: _text(v) for k, v in row.items()} for row in table.to_pylist()]


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Path:
    study = _copy_fixture(tmp_path_factory.mktemp("pt"))
    out = study.parent.parent / "out"
    build_study(study, BuildOptions(out=out))
    return out


# --- the hand-computed fixture (its README gives each cell's arithmetic) ---------------------


def test_cells_match_the_hand_computed_table(built: Path) -> None:
    with (FIXTURE / "expected_persontime.csv").open(encoding="utf-8") as handle:
        expected = list(csv.DictReader(handle))
    assert _rows(built / "persontime.parquet") == expected


def test_columns_types_and_order(built: Path) -> None:
    schema = pq.read_schema(built / "persontime.parquet")
    cohort = pq.read_schema(built / "cohort.parquet")
    assert schema.names == [
        "patient_id",
        "age_band",
        "age_band_start",
        "calendar_year",
        "since_index_band",
        "cell_start",
        "cell_end",
        "days",
        "days_at_risk_heart_failure",
        "events_heart_failure",
        "days_at_risk_type2_diabetes",
        "events_type2_diabetes",
    ]
    types = {f.name: str(f.type) for f in schema}
    assert schema.field("patient_id").type == cohort.field("patient_id").type
    assert types["age_band_start"] == types["calendar_year"] == types["days"] == "int32"
    assert types["cell_start"] == "date32[day]"
    assert types["days_at_risk_heart_failure"] == "int32"
    assert types["events_heart_failure"] == "int8"


def test_every_column_is_documented_in_the_dictionary(built: Path) -> None:
    names = pq.read_schema(built / "persontime.parquet").names
    with (built / "dictionary.csv").open(encoding="utf-8") as handle:
        documented = [r["column"] for r in csv.DictReader(handle)]
    assert [c for c in documented if c.startswith("persontime.")] == [
        f"persontime.{n}" for n in names
    ]
    assert "# Data dictionary of persontime.parquet" in (built / "dictionary.md").read_text()
    field = pq.read_schema(built / "persontime.parquet").field("days")
    assert b"365.25" in (field.metadata or {})[b"computed"]


def test_the_manifest_lists_and_hashes_the_file(built: Path) -> None:
    manifest = json.loads((built / "manifest.json").read_text(encoding="utf-8"))
    assert "persontime.parquet" in manifest["outputs"]
    assert manifest["rows"]["persontime"] == 22


def test_sums_equal_the_cohort_time_at_risk(built: Path) -> None:
    cells = pq.read_table(built / "persontime.parquet").to_pylist()
    for patient in pq.read_table(built / "cohort.parquet").to_pylist():
        mine = [c for c in cells if c["patient_id"] == patient["patient_id"]]
        assert sum(c["days"] for c in mine) == patient["followup_days"]
        for name in ("heart_failure", "type2_diabetes"):
            risk = [c[f"days_at_risk_{name}"] for c in mine]
            events = [c[f"events_{name}"] for c in mine]
            if not patient[f"at_risk_{name}"]:
                assert set(risk) == set(events) == {None}
                continue
            assert sum(risk) == patient[f"time_{name}"]
            assert sum(events) == (patient[f"event_{name}"] == 1)


def test_a_study_without_the_option_writes_no_file(tmp_path: Path) -> None:
    text = (FIXTURE / "study.yaml").read_text(encoding="utf-8")
    without = text[: text.index("persontime:")] + text[text.index("output:") :]
    study = _copy_fixture(tmp_path, without)
    out = tmp_path / "out"
    build_study(study, BuildOptions(out=out))
    assert not (out / "persontime.parquet").exists()
    assert "persontime" not in (out / "dictionary.csv").read_text(encoding="utf-8")
    assert not any(s.name.startswith("persontime") for s in plan_study(study).stages)


# --- the accounting check fails a build whose cells do not add up ----------------------------


def _run_with_broken_cells(tmp_path: Path, where: str = "TRUE", *, shift: str = "") -> None:
    """Run the fixture's plan with its cells broken as a defect would: some lost, or the cells
    of patient ``shift`` moved a day later (same days, same sums)."""
    study = _copy_fixture(tmp_path)
    plan = plan_study(study)
    broken = plan.stage("persontime").query.copy().where(where)
    if shift:
        moved = {
            column: exp.Case()
            .when(
                exp.column("patient_id").eq(exp.Literal.string(shift)),
                add_days(exp.column(column), 1),
            )
            .else_(exp.column(column))
            .as_(column)
            for column in ("cell_start", "cell_end")
        }
        columns = [moved.get(s.alias_or_name, exp.column(s.alias_or_name)) for s in broken.selects]
        broken = exp.select(*columns).from_(broken.subquery("moved"))
    stages = tuple(
        dataclasses.replace(s, query=broken) if s.name == "persontime" else s for s in plan.stages
    )
    plan = dataclasses.replace(plan, stages=stages)
    DuckDBEngine().run(plan, discover_extract(study.parent, plan.sources))


def test_the_fixture_plan_runs_unbroken(tmp_path: Path) -> None:
    _run_with_broken_cells(tmp_path)  # the helper itself breaks nothing unless asked


def test_accounting_check_names_the_patient_when_cells_move(tmp_path: Path) -> None:
    with pytest.raises(EngineError, match=r"PT-02, cells do not run from index \+ 1"):
        _run_with_broken_cells(tmp_path, shift="PT-02")


def test_accounting_check_names_the_patient_when_days_are_lost(tmp_path: Path) -> None:
    with pytest.raises(EngineError, match=r"person-time does not add up.*PT-06, days <> follow"):
        _run_with_broken_cells(
            tmp_path, "NOT (p.patient_id = 'PT-06' AND p.piece_end > DATE '2018-01-01')"
        )


def test_accounting_check_names_the_patient_when_an_event_is_lost(tmp_path: Path) -> None:
    # PT-04's last cell holds the heart failure onset (the day of death); dropping the cell
    # loses both days and the event: the first difference named is the days.
    with pytest.raises(EngineError, match=r"PT-04, days <> followup_days"):
        _run_with_broken_cells(
            tmp_path, "NOT (p.patient_id = 'PT-04' AND p.piece_end = DATE '2016-06-30')"
        )


# --- the study option's errors, located ------------------------------------------------------


def _problems(tmp_path: Path, option: str, age: str = "[40, 85]") -> list[str]:
    text = (FIXTURE / "study.yaml").read_text(encoding="utf-8")
    text = text[: text.index("persontime:")] + option + "\n" + text[text.index("output:") :]
    text = text.replace("between: [40, 85]", f"between: {age}")
    study = _copy_fixture(tmp_path, text)
    with pytest.raises(ConfigError) as caught:
        load_study(study)
    return [f"{p.line}:{p.column} [{p.code}] {p.message}" for p in caught.value.problems]


@pytest.mark.parametrize(
    ("option", "age", "found"),
    [
        (
            "persontime: {age_bands: [40, 40, 60]}",
            "[40, 85]",
            "[bad-value] persontime.age_bands: lower bounds must be strictly ascending",
        ),
        (
            "persontime: {age_bands: [40], since_index_years: [1, 3]}",
            "[40, 85]",
            "persontime.since_index_years: must start at 0",
        ),
        (
            "persontime: {age_bands: [50, 60]}",
            "[40, 85]",
            "[age-band-gap] the first age band starts at 50 but the study admits patients "
            "from age 40",
        ),
        ("persontime: {age_bands: [40], calendar_years: true}", "[40, 85]", "[unknown-key]"),
        ("persontime: {age_bands: []}", "[40, 85]", "[bad-value] persontime.age_bands"),
    ],
)
def test_bad_options_are_refused_with_their_place(
    tmp_path: Path, option: str, age: str, found: str
) -> None:
    problems = _problems(tmp_path, option, age)
    assert any(found in p for p in problems), problems
    assert all(p.startswith("26:") for p in problems), problems  # the persontime line


def test_the_gap_error_points_at_the_first_band(tmp_path: Path) -> None:
    (problem,) = _problems(tmp_path, "persontime:\n  age_bands: [45, 60]")
    assert problem.startswith("27:15 [age-band-gap]")


def test_no_age_step_is_a_gap_too(tmp_path: Path) -> None:
    text = (FIXTURE / "study.yaml").read_text(encoding="utf-8")
    text = text.replace("  - age:\n      between: [40, 85]\n", "")
    study = _copy_fixture(tmp_path, text)
    with pytest.raises(ConfigError, match=r"\[age-band-gap\].*has no age step"):
        load_study(study)


# --- the oracle: every follow-up day, one at a time -----------------------------------------


def _age(born: dt.date, on: dt.date) -> int:
    """Whole years completed (demo spec §1.3: 29 February's birthday is 1 March otherwise)."""
    return on.year - born.year - ((on.month, on.day) < (born.month, born.day))


def _band(bounds: tuple[int, ...], years: int) -> int:
    return max(b for b in bounds if b <= years)


def _label(bounds: tuple[int, ...], low: int, *, inclusive: bool) -> str:
    later = [b for b in bounds if b > low]
    if not later:
        return f"{low}+"
    return f"{low}-{later[0] - 1}" if inclusive else f"{low}-{later[0]}"


def oracle(span: dict[str, Any], option: PersonTime) -> list[dict[str, Any]]:
    """The cells of one patient, by classifying each follow-up day on its own."""
    cells: list[dict[str, Any]] = []
    day = span["index_date"] + dt.timedelta(days=1)
    while day <= span["followup_end"]:
        age = _band(option.age_bands, _age(span["birth_date"], day))
        key: dict[str, Any] = {"age_band": _label(option.age_bands, age, inclusive=True)}
        key["age_band_start"] = age
        if option.calendar_year:
            key["calendar_year"] = day.year
        if option.since_index_years is not None:
            since = _band(option.since_index_years, _age(span["index_date"], day))
            key["since_index_band"] = _label(option.since_index_years, since, inclusive=False)
        if cells and all(cells[-1][k] == v for k, v in key.items()):
            cells[-1]["cell_end"] = day
        else:
            cells.append({"patient_id": span["patient_id"], **key, "cell_start": day})
            cells[-1]["cell_end"] = day
        day += dt.timedelta(days=1)
    onset = span["onset_x"]
    for cell in cells:
        days = (cell["cell_end"] - cell["cell_start"]).days + 1
        cell["days"] = days
        if not span["at_risk_x"]:
            cell["days_at_risk_x"] = cell["events_x"] = None
            continue
        inside = onset is not None and cell["cell_start"] <= onset <= cell["cell_end"]
        if onset is None or onset > cell["cell_end"]:
            cell["days_at_risk_x"] = days
        elif onset < cell["cell_start"]:
            cell["days_at_risk_x"] = 0
        else:
            cell["days_at_risk_x"] = (onset - cell["cell_start"]).days + 1
        cell["events_x"] = int(inside)
    return cells


def _run_cells(spans: list[dict[str, Any]], option: PersonTime) -> list[dict[str, Any]]:
    con = duckdb.connect()
    con.execute(
        "CREATE TABLE persontime_spans (patient_id INT, birth_date DATE, index_date DATE, "
        "piece_start DATE, piece_end DATE, at_risk_x BOOLEAN, onset_x DATE)"
    )
    rows = [
        (
            s["patient_id"],
            s["birth_date"],
            s["index_date"],
            s["index_date"] + dt.timedelta(days=1),
            s["followup_end"],
            s["at_risk_x"],
            s["onset_x"],
        )
        for s in spans
        if s["followup_end"] > s["index_date"]
    ]
    if rows:
        con.executemany("INSERT INTO persontime_spans VALUES (?, ?, ?, ?, ?, ?, ?)", rows)
    sql = cells_query(["x"], option).sql("duckdb") + " ORDER BY patient_id, cell_start"
    frame = con.sql(sql).to_arrow_table()
    con.close()
    return frame.to_pylist()


DAYS = st.dates(dt.date(1915, 1, 1), dt.date(1985, 12, 31))


@st.composite
def spans(draw: st.DrawFn) -> dict[str, Any]:
    index = draw(st.dates(dt.date(2012, 1, 1), dt.date(2016, 12, 31)))
    length = draw(st.integers(0, 2200))
    end = index + dt.timedelta(days=length)
    at_risk = draw(st.booleans())
    onset = None
    if at_risk and length and draw(st.booleans()):
        onset = index + dt.timedelta(days=draw(st.integers(1, length)))
    return {
        "birth_date": draw(DAYS),
        "index_date": index,
        "followup_end": end,
        "at_risk_x": at_risk,
        "onset_x": onset,
    }


BOUNDS = st.lists(st.integers(1, 99), max_size=6, unique=True).map(lambda b: (0, *sorted(b)))


@st.composite
def options(draw: st.DrawFn) -> PersonTime:
    since = draw(st.one_of(st.none(), BOUNDS.map(lambda b: b[:4])))
    return PersonTime(
        age_bands=draw(BOUNDS), calendar_year=draw(st.booleans()), since_index_years=since
    )


LEAP = {
    "birth_date": dt.date(1956, 2, 29),
    "index_date": dt.date(2016, 2, 29),
    "followup_end": dt.date(2019, 3, 2),
    "at_risk_x": True,
    "onset_x": dt.date(2017, 3, 1),
}


@settings(max_examples=60, deadline=None)
@given(st.lists(spans(), min_size=1, max_size=25), options())
@example([LEAP], PersonTime(age_bands=(0, 60, 61, 62), since_index_years=(0, 1, 2)))
def test_cells_equal_the_day_by_day_oracle(spans: list[dict[str, Any]], option: PersonTime) -> None:
    for number, span in enumerate(spans):
        span["patient_id"] = number
    expected = [cell for span in spans for cell in oracle(span, option)]
    got = _run_cells(spans, option)
    assert got == expected
    for span in spans:
        mine = [c for c in got if c["patient_id"] == span["patient_id"]]
        assert sum(c["days"] for c in mine) == max(
            (span["followup_end"] - span["index_date"]).days, 0
        )


@pytest.mark.spark
@pytest.mark.slow
def test_spark_writes_the_same_bytes(
    built: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    require(importlib.util.find_spec("pyspark"), "pyspark is not installed (ascertain[spark])")
    require(shutil.which("java") or os.environ.get("JAVA_HOME"), "no Java runtime for Spark")
    from pipeline.engine import _spark_fetch

    # The 22 cells streamed in partitions of at most 5 rows: still DuckDB's bytes.
    monkeypatch.setattr(_spark_fetch, "PARTITION_ROWS", 5)
    study = _copy_fixture(tmp_path)
    out = tmp_path / "spark"
    build_study(study, BuildOptions(out=out, engine="spark", threads=2))
    for name in ("persontime.parquet", "cohort.parquet", "dictionary.csv"):
        assert (out / name).read_bytes() == (built / name).read_bytes(), name
