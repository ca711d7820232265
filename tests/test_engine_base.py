"""The steps every engine shares (pipeline.engine.base), and the codes engine errors carry.

Most tests run plans on :class:`tests.fake_engine.FakeEngine`, which executes nothing: the
stage loop, its callbacks, the checks and the result's engine name are the base's own code.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pytest
from sqlglot import exp, parse_one

from pipeline import plan_study
from pipeline.compile import Plan, SourceTable, Stage
from pipeline.engine import DuckDBEngine, SparkEngine
from pipeline.engine._spark_session import SessionRequest, master_addresses, parse_settings
from pipeline.errors import EngineError
from pipeline.extract import ExtractTable

from .conftest import DEMO_STUDY
from .fake_engine import FakeEngine


def _stage(name: str, sql: str, **kind: str) -> Stage:
    query = parse_one(sql, read="duckdb")
    assert isinstance(query, exp.Query)
    return Stage(name, query, f"test stage {name}", **kind)  # type: ignore[arg-type]


def test_stages_run_in_plan_order_with_numbered_callbacks() -> None:
    plan = plan_study(DEMO_STUDY)
    called: list[tuple[str, int, int]] = []
    engine = FakeEngine()
    result = engine.run(plan, {}, on_stage=lambda s, n, t: called.append((s.name, n, t)))
    names = [stage.name for stage in plan.stages]
    total = len(names)
    assert called == [(name, i, total) for i, name in enumerate(names, start=1)]
    assert engine.ledger.stages == names  # each stage read only what existed
    assert [(r.name, r.kind) for r in result.stages] == [(s.name, s.kind) for s in plan.stages]
    assert all(r.rows is None for r in result.stages if r.kind == "view")
    assert (result.engine, result.engine_version) == ("fake", "0")  # set by the base
    assert list(result.outputs) == [output for output, _, _ in plan.outputs]


def test_a_stage_reading_what_does_not_exist_yet_is_refused() -> None:
    # The plan refuses it before any engine sees it: its tree reads "later", made after it.
    source = SourceTable("patients", ("patient_id",))
    first = _stage("first", "SELECT * FROM src_patients JOIN later USING (patient_id)")
    assert first.depends_on == ("later", "src_patients")  # read from the tree
    with pytest.raises(ValueError, match=r"stage first reads \['later'\] before they exist"):
        Plan(
            "t",
            (source,),
            (first, _stage("later", "SELECT * FROM src_patients")),
            (("later", "later", ()),),
        )


def test_the_fake_engine_refuses_a_stage_whose_input_this_run_did_not_make() -> None:
    # A plan run through Plan.through with a stage left out: the fake notices the gap.
    plan = plan_study(DEMO_STUDY)
    first = plan.stages[0]
    reader = next(s for s in plan.stages if first.name in s.depends_on)
    gap = Plan(plan.study, plan.sources, (first, reader), ())
    object.__setattr__(gap, "stages", (reader,))  # bypass the plan's own order check
    with pytest.raises(EngineError) as caught:
        FakeEngine().run(gap, {})
    assert caught.value.code == "stage-input-missing"
    assert caught.value.where == f"stage {reader.name}"
    assert first.name in str(caught.value)


def test_a_failed_check_names_the_stage_and_stops_the_run() -> None:
    plan = plan_study(DEMO_STUDY)
    check = next(stage for stage in plan.stages if stage.kind == "check")
    engine = FakeEngine(failing_checks={check.name: [("HM-001", 3), ("HM-002", 4)]})
    with pytest.raises(EngineError) as caught:
        engine.run(plan, {})
    error = caught.value
    assert (error.code, error.where) == ("data-check-failed", f"stage {check.name}")
    assert str(error) == (
        f"stage {check.name} [data-check-failed] {check.failure} (first rows: HM-001, 3; HM-002, 4)"
    )
    assert engine.ledger.stages[-1] == check.name  # nothing ran after it


def _tiny_plan(*stages: Stage) -> Plan:
    return Plan("t", (), stages, ((stages[0].name, stages[0].name, ()),))


def test_duckdb_check_and_stage_failures_carry_codes() -> None:
    numbers = _stage("numbers", "SELECT 1 AS a UNION ALL SELECT 2 AS a")
    too_big = _stage(
        "too_big",
        "SELECT a FROM numbers WHERE a > 1",
        kind="check",
        failure="a number above 1",
    )
    with pytest.raises(EngineError) as caught:
        DuckDBEngine(threads=1).run(_tiny_plan(numbers, too_big), {})
    assert str(caught.value) == "stage too_big [data-check-failed] a number above 1 (first rows: 2)"

    bad = _stage("bad", "SELECT CAST('x' AS INTEGER) AS a")
    with pytest.raises(EngineError) as caught:
        DuckDBEngine(threads=1).run(_tiny_plan(bad), {})
    assert (caught.value.code, caught.value.where) == ("stage-failed", "stage bad")
    assert "failed on DuckDB: Conversion Error" in str(caught.value)


class _ShowsOneRow(DuckDBEngine):
    CHECK_ROWS_SHOWN = 1


def test_the_declared_number_of_check_rows_is_shown() -> None:
    numbers = _stage("numbers", "SELECT * FROM (VALUES (1), (2), (3)) AS t(a)")
    above = _stage("above", "SELECT a FROM numbers", kind="check", failure="any")
    plan = _tiny_plan(numbers, above)
    for engine, shown in ((DuckDBEngine(threads=1), 3), (_ShowsOneRow(threads=1), 1)):
        with pytest.raises(EngineError) as caught:
            engine.run(plan, {})
        assert str(caught.value).split("first rows: ")[1].count(";") == shown - 1


def test_duckdb_result_names_its_engine() -> None:
    result = DuckDBEngine(threads=1).run(_tiny_plan(_stage("one", "SELECT 1 AS a")), {})
    assert result.engine == "duckdb"
    assert result.outputs["one"].to_pylist() == [{"a": 1}]
    assert result.run_settings["memory_limit_from"] == "machine"


def _fhir_table() -> ExtractTable:
    return ExtractTable("patients", (Path("Patient.ndjson"),), "fhir", ("patient_id",))


# Each refusal the engine package raises before a database runs, with its stable code.
REFUSALS: list[tuple[str, Callable[[], object]]] = [
    ("spark-storage-invalid", lambda: SparkEngine(stage_storage="disk")),
    ("spark-storage-invalid", lambda: SparkEngine(stage_storage="checkpoint")),
    ("spark-master-invalid", lambda: master_addresses("nonsense")),
    ("spark-master-invalid", lambda: master_addresses("spark://host")),
    ("spark-setting-invalid", lambda: parse_settings(["spark.x"], "--spark-conf")),
    (
        "spark-setting-refused",
        lambda: SessionRequest(settings={"spark.sql.ansi.enabled": "false"}).passed({}),
    ),
    (
        "fhir-unsupported",
        lambda: SparkEngine().run(_tiny_plan(_stage("one", "SELECT 1 AS a")), {"p": _fhir_table()}),
    ),
]


@pytest.mark.parametrize(("code", "refused"), REFUSALS, ids=[c for c, _ in REFUSALS])
def test_engine_refusals_carry_their_code(code: str, refused: Callable[[], object]) -> None:
    with pytest.raises(EngineError) as caught:
        refused()
    assert caught.value.code == code
    assert f"[{code}] " in str(caught.value)
