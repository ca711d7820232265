"""The Spark engine gives the same outputs as DuckDB for the same plan.

One SparkSession serves the whole module (each run gets its own ``newSession()``). Skipped, with
the reason, when pyspark or Java is missing (``pip install 'ascertain[spark]'`` and a JDK 17);
in CI (``CI=true``) that fails instead (``helpers.require``).
"""

from __future__ import annotations

import importlib.util
import json
import math
import os
import shutil
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sqlglot import exp, parse_one
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.compile import Plan, SourceTable, Stage
from pipeline.engine import BatchSink, DuckDBEngine, SparkEngine, _spark_fetch
from pipeline.engine import duckdb as duckdb_engine
from pipeline.engine.spark_rewrites import spark_query
from pipeline.errors import EngineError, ExtractError
from pipeline.extract import discover_extract
from pipeline.outputs import write_parquet_stream
from pipeline.workflows.build import plan_study

from .conftest import DEMO_STUDY, HANDMADE, ROOT
from .helpers import require

pytestmark = [pytest.mark.spark, pytest.mark.slow]


@pytest.fixture(autouse=True, scope="module")
def _spark_is_available() -> None:
    require(importlib.util.find_spec("pyspark"), "pyspark is not installed (ascertain[spark])")
    require(
        shutil.which("java") or os.environ.get("JAVA_HOME"),
        "no Java runtime for Spark (install a JDK 17)",
    )


OUTPUTS = ("cohort", "population", "attrition", "quality", "rows_read")


@pytest.fixture(scope="module")
def session() -> Iterator[Any]:
    spark = SparkEngine.create_session("local[2]")
    yield spark
    spark.stop()


@pytest.fixture(scope="module")
def plan() -> Plan:
    return plan_study(DEMO_STUDY)


def _assert_same(duck: pa.Table, spark: pa.Table, name: str) -> None:
    """Same rows in the same order; dates, booleans, text exact, doubles to 1e-9."""
    assert spark.column_names == duck.column_names, name
    spark = spark.cast(duck.schema)
    assert spark.num_rows == duck.num_rows, name
    for column, field in zip(duck.column_names, duck.schema, strict=True):
        left, right = duck[column].to_pylist(), spark[column].to_pylist()
        if pa.types.is_floating(field.type):
            for i, (a, b) in enumerate(zip(left, right, strict=True)):
                assert (a is None) == (b is None), (name, column, i, a, b)
                if a is not None:
                    assert math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-9), (name, column, i, a, b)
        else:
            assert left == right, (name, column)


def _both(
    plan: Plan,
    session: Any,
    extract: Path,
    sinks: Callable[[str], dict[str, BatchSink]] = lambda engine: {},
) -> tuple[dict[str, pa.Table], ...]:
    """Both engines' outputs; ``sinks(engine)`` the outputs each streams (``duckdb``, ``spark``)."""
    tables = discover_extract(extract, plan.sources)
    duck = DuckDBEngine().run(plan, tables, sinks=sinks("duckdb"))
    spark = SparkEngine(session=session).run(plan, tables, sinks=sinks("spark"))
    assert spark.engine == "spark"
    assert [s.name for s in spark.stages] == [s.name for s in duck.stages]
    assert [s.rows for s in spark.stages] == [s.rows for s in duck.stages]
    assert spark.streamed == duck.streamed
    return duck.outputs, spark.outputs


@pytest.mark.parametrize(
    "extract", [HANDMADE, HANDMADE.parent / "handmade_measures"], ids=lambda p: p.name
)
def test_handmade_extracts_give_the_same_outputs(plan: Plan, session: Any, extract: Path) -> None:
    duck, spark = _both(plan, session, extract)
    for name in OUTPUTS:
        _assert_same(duck[name], spark[name], name)


def test_synthetic_extract_gives_the_same_cohort(
    plan: Plan, session: Any, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Streamed as the build streams them (doubles rounded once in Python), in batches and
    # row groups that do not line up: DuckDB's batches of 999 rows, Spark's partitions of
    # 1,000, row groups of 1,024; the files are equal byte for byte.
    monkeypatch.setattr(duckdb_engine, "FETCH_ROWS", 999)
    monkeypatch.setattr(_spark_fetch, "PARTITION_ROWS", 1000)
    docs = {"cohort": plan.columns, "population": None}

    def sinks(engine: str) -> dict[str, BatchSink]:
        def sink(output: str) -> BatchSink:
            path = tmp_path / f"{engine}_{output}.parquet"
            return lambda batches: write_parquet_stream(batches, path, docs[output], 1024)

        return {output: sink(output) for output in docs}

    duck, spark = _both(plan, session, ROOT / "synthetic_extract", sinks)
    for name in OUTPUTS:
        if name not in docs:
            _assert_same(duck[name], spark[name], name)
    for output in docs:
        duck_file, spark_file = (tmp_path / f"{e}_{output}.parquet" for e in ("duckdb", "spark"))
        assert spark_file.read_bytes() == duck_file.read_bytes(), output
        rows = pq.ParquetFile(duck_file).metadata.num_rows
        assert rows > 1000, output
        assert pq.ParquetFile(spark_file).metadata.num_row_groups == -(-rows // 1024), output


# Each rewrite rule, checked by running the DuckDB expression on both engines.
_TEXTS = [
    "2019-01-01",
    "2019-1-1",
    " 2019-01-01 ",
    "2019/01/01",
    "2019 01 01",
    "2019",
    "2019-01",
    "+2019-01-01",
    "2019-01-01 12:00:00",
    "2019-01-01T12:00",
    "2019-01-01 BC",
    "2019-01-01x",
    "2019-02-30",
    "20190101",
    "01/02/2019",
    "1950",
    "1950.0",
    "2.5",
    "-2.5",
    "1e2",
    "5d",
    "inf",
    " 12 ",
    "abc",
    "",
    None,
]
_EXPRESSIONS = {
    "as_date": "CAST(TRY_CAST(t AS DATE) AS VARCHAR)",
    "as_int": "TRY_CAST(t AS INT)",
    "as_double": "TRY_CAST(t AS DOUBLE)",
    "digits": "REGEXP_MATCHES(t, '[0-9]{4}')",
    "full": "REGEXP_FULL_MATCH(t, '[0-9]+')",
    "ratio": "CAST(LENGTH(t) AS DOUBLE) / (LENGTH(t) - 4)",
    "joined": "CONCAT(t, '|', NULL)",
    "strptime": "CAST(CAST(TRY_STRPTIME(t, '%Y/%m/%d') AS DATE) AS VARCHAR)",
}
# Declared differences: DuckDB reads 'infinity' (and so 'inf') as a date, Spark has none.
_KNOWN = {("inf", "as_date")}


def test_rewrite_rules_make_spark_agree_with_duckdb(session: Any) -> None:
    values = exp.Values(
        expressions=[exp.Tuple(expressions=[exp.convert(t)]) for t in _TEXTS],
        alias=exp.TableAlias(this=exp.to_identifier("v"), columns=[exp.to_identifier("t")]),
    )
    selects = [parse_one(sql, read="duckdb").as_(name) for name, sql in _EXPRESSIONS.items()]
    query = exp.select("t", *selects).from_(values)
    duck = duckdb.sql(query.sql("duckdb")).to_arrow_table().to_pylist()
    spark = [row.asDict() for row in session.sql(spark_query(query).sql("spark")).collect()]
    key = {t: i for i, t in enumerate(_TEXTS)}
    duck.sort(key=lambda r: key[r["t"]])
    spark.sort(key=lambda r: key[r["t"]])
    for d, s in zip(duck, spark, strict=True):
        for name in _EXPRESSIONS:
            a, b = d[name], s[name]
            if (d["t"], name) in _KNOWN:
                continue
            same = a == b or (isinstance(a, float) and math.isnan(a) and math.isnan(b))
            assert same, (d["t"], name, a, b)


def test_regexp_matches_becomes_rlike() -> None:
    query = parse_one("SELECT REGEXP_MATCHES(code, '^E11') AS dm FROM t", read="duckdb")
    assert "RLIKE '^E11'" in spark_query(query).sql("spark")
    assert "REGEXP_MATCHES" not in spark_query(query).sql("spark")


def test_a_failing_check_stops_the_run(session: Any) -> None:
    rows = exp.select(exp.Literal.number(1).as_("n"))
    plan = Plan(
        study="check",
        sources=(),
        stages=(Stage("must_be_empty", rows, "a check", kind="check", failure="oops"),),
        outputs=(),
    )
    with pytest.raises(EngineError) as caught:
        SparkEngine(session=session).run(plan, {})
    assert str(caught.value) == "stage must_be_empty [data-check-failed] oops (first rows: 1)"


def test_source_typing_and_patient_filter(session: Any) -> None:
    patients = SourceTable("patients", ("patient_id", "sex"))
    query = exp.select("patient_id", "sex").from_("src_patients")
    plan = Plan(
        study="bind",
        sources=(patients,),
        stages=(Stage("picked", query, "bound rows"),),
        outputs=(("picked", "picked", ("patient_id",)),),
    )
    tables = discover_extract(HANDMADE, (patients,))
    wanted = ("HM-002", "HM-001")
    duck = DuckDBEngine().run(plan, tables, patients=wanted).outputs["picked"]
    spark = SparkEngine(session=session).run(plan, tables, patients=wanted).outputs["picked"]
    _assert_same(duck, spark, "picked")
    assert spark["patient_id"].to_pylist() == ["HM-001", "HM-002"]


def test_cli_build_with_spark_writes_the_same_files(session: Any, tmp_path: Path) -> None:
    outs = {}
    for engine in ("duckdb", "spark"):
        out = tmp_path / engine
        result = CliRunner().invoke(
            app,
            [
                "build",
                str(DEMO_STUDY),
                "--extract",
                str(HANDMADE),
                "--out",
                str(out),
                "--engine",
                engine,
                "--quiet",
            ],
        )
        assert result.exit_code == 0, result.output
        outs[engine] = out
    files = ("cohort.parquet", "population.parquet", "attrition.csv", "quality.csv")
    for name in (*files, "dictionary.csv"):
        assert (outs["spark"] / name).read_bytes() == (outs["duckdb"] / name).read_bytes(), name
    recorded = json.loads((outs["spark"] / "manifest.json").read_text())["engine"]
    assert recorded["name"] == "spark"
    assert recorded["master"].startswith("local[")
    assert recorded["settings"]["spark.sql.ansi.enabled"] == "true"
    # verify rebuilds a Spark build on the master and with the settings it is given.
    again = CliRunner().invoke(
        app,
        [
            *("verify", str(outs["spark"]), "--study", str(DEMO_STUDY)),
            *("--extract", str(HANDMADE), "--spark-master", "local[1]"),
            *("--spark-conf", "spark.sql.shuffle.partitions=2"),
        ],
    )
    assert again.exit_code == 0, again.output
    assert "identical" in again.output


def test_spark_master_needs_the_spark_engine(tmp_path: Path) -> None:
    result = CliRunner().invoke(
        app,
        [
            "build",
            str(DEMO_STUDY),
            "--extract",
            str(HANDMADE),
            "--out",
            str(tmp_path / "out"),
            "--spark-master",
            "local[1]",
        ],
    )
    assert result.exit_code == 2
    assert "--engine spark" in result.output


def test_a_ragged_csv_row_fails_the_read_naming_the_file(
    plan: Plan, session: Any, tmp_path: Path
) -> None:
    extract = tmp_path / "ragged"
    shutil.copytree(HANDMADE, extract)
    with (extract / "encounters.csv").open("a", encoding="utf-8") as f:
        f.write("HM-001,2016-01-01\n")
    tables = discover_extract(extract, plan.sources)
    with pytest.raises(
        ExtractError, match=r"encounters\.csv \[csv-ragged-row\] row 'HM-001,2016-01-01'"
    ):
        SparkEngine(session=session).run(plan, tables)


@pytest.mark.parametrize("storage", ["checkpoint", "cache"])
def test_reliable_stage_storage_gives_the_same_rows(
    session: Any, tmp_path: Path, storage: str
) -> None:
    patients = SourceTable("patients", ("patient_id", "sex"))
    query = exp.select("patient_id", "sex").from_("src_patients")
    plan = Plan(
        study="storage",
        sources=(patients,),
        stages=(Stage("kept", query, "bound rows"),),
        outputs=(("kept", "kept", ("patient_id",)),),
    )
    tables = discover_extract(HANDMADE, (patients,))
    folder = tmp_path / "shared-checkpoints"
    folder.mkdir()
    (folder / "someone-elses.txt").write_text("not ours")
    engine = SparkEngine(
        session=session,
        stage_storage=storage,
        checkpoint_folder=folder.as_uri() if storage == "checkpoint" else None,
    )
    result = engine.run(plan, tables)
    duck = DuckDBEngine().run(plan, tables).outputs["kept"]
    _assert_same(duck, result.outputs["kept"], "kept")
    assert result.engine_info["stage_storage"] == storage
    # The run's own checkpoint subfolder is removed; nothing else in the folder is touched.
    assert sorted(p.name for p in folder.iterdir()) == ["someone-elses.txt"]


def test_a_sweep_on_spark_writes_the_same_table_as_on_duckdb(session: Any, tmp_path: Path) -> None:
    # One variant of the hand-made window fixture (tests/fixtures/sweep_window): a Spark stage
    # costs about a second here, so the sweep is kept to its base and one variant.
    base = (ROOT / "tests" / "fixtures" / "sweep_window" / "study.yaml").as_posix()
    sweep = tmp_path / "sweep.yaml"
    sweep.write_text(
        f"sweep: spark\nbase: {base}\nvariants:\n  window_730:\n"
        "    study.definition_changes.heart_failure.two heart failure codes.within_days: 730\n",
        encoding="utf-8",
    )
    outs = {}
    for engine in ("duckdb", "spark"):
        outs[engine] = tmp_path / engine
        args = ["sweep", str(sweep), "--out", str(outs[engine]), "--engine", engine, "--quiet"]
        result = CliRunner().invoke(app, args)
        assert result.exit_code == 0, result.output
    duck, spark = ((outs[e] / "sweep.csv").read_bytes() for e in ("duckdb", "spark"))
    assert spark == duck
    assert b"window_730,no,heart_failure,14," in spark  # the fixture's README: 14 patients
