"""Spark settings, master URLs, extract locations: decided before Java starts, without Spark."""

from __future__ import annotations

from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.config import load_study
from pipeline.config._spark import SparkSettings
from pipeline.engine._spark_session import (
    MACHINE_PATH,
    REDACTED,
    REQUIRED,
    TOOL_DEFAULTS,
    SessionRequest,
    master_addresses,
    parse_settings,
    redact,
    safe_master,
    user_settings,
)
from pipeline.errors import ConfigError, EngineError, ExtractError
from pipeline.extract import extract_location
from pipeline.workflows.prepare import BuildOptions, make_engine

from .conftest import DEMO_STUDY, HANDMADE


@pytest.mark.parametrize("master", ["local", "local[*]", "local[2]", "local[4,2]", "yarn"])
def test_master_urls_without_an_address(master: str) -> None:
    assert master_addresses(master) == []


def test_standalone_master_urls_name_their_addresses() -> None:
    assert master_addresses("spark://127.0.0.1:7077") == [("127.0.0.1", 7077)]
    assert master_addresses("spark://a.example:7077,b.example:7078") == [
        ("a.example", 7077),
        ("b.example", 7078),
    ]


@pytest.mark.parametrize(
    ("master", "said"),
    [
        ("bogus", "not a Spark master URL"),
        ("local[0]", "not a Spark master URL"),
        ("sc://127.0.0.1:15002", "not a Spark master URL"),
        ("spark://127.0.0.1", "needs HOST:PORT"),
        ("spark://127.0.0.1:0", "needs HOST:PORT"),
        ("spark://127.0.0.1:99999", "needs HOST:PORT"),
        ("spark://", "needs HOST:PORT"),
    ],
)
def test_malformed_master_urls_are_refused(master: str, said: str) -> None:
    with pytest.raises(EngineError, match=said):
        master_addresses(master)


def test_spark_conf_pairs() -> None:
    assert parse_settings(["spark.a.b=1", "spark.c= x=y"], "--spark-conf") == {
        "spark.a.b": "1",
        "spark.c": " x=y",
    }
    for bad in ["spark.a.b", "shuffle=4", "spark.a.b="]:
        with pytest.raises(EngineError, match=f"--spark-conf takes spark.KEY=VALUE, not '{bad}'"):
            parse_settings([bad], "--spark-conf")


def test_user_settings_from_defaults_file_and_submit_args(tmp_path: Path) -> None:
    conf = tmp_path / "conf"
    conf.mkdir()
    (conf / "spark-defaults.conf").write_text(
        "# a comment\nspark.sql.shuffle.partitions   200\nspark.driver.memory=8g\n\n"
        "spark.executor.memory 4g\n",
        encoding="utf-8",
    )
    environ = {
        "SPARK_CONF_DIR": str(conf),
        "SPARK_HOME": str(tmp_path),
        "PYSPARK_SUBMIT_ARGS": "--driver-memory 6g --conf spark.executor.cores=2 pyspark-shell",
    }
    assert user_settings(environ) == {
        "spark.sql.shuffle.partitions": "200",
        "spark.driver.memory": "6g",  # the submit args beat the defaults file, as in spark-submit
        "spark.executor.memory": "4g",
        "spark.executor.cores": "2",
    }
    # SPARK_HOME/conf when SPARK_CONF_DIR is not set (here the same folder)
    assert user_settings({"SPARK_HOME": str(tmp_path)})["spark.driver.memory"] == "8g"
    assert user_settings({"SPARK_HOME": str(tmp_path / "elsewhere")}) == {}
    (tmp_path / "conf" / "spark-defaults.conf").rename(tmp_path / "mine.conf")
    args = f"--properties-file {tmp_path / 'mine.conf'} pyspark-shell"
    found = user_settings({"SPARK_HOME": str(tmp_path), "PYSPARK_SUBMIT_ARGS": args})
    assert found["spark.sql.shuffle.partitions"] == "200"


def test_tool_defaults_yield_to_the_user_and_required_settings_do_not() -> None:
    request = SessionRequest("local[2]", {"spark.executor.memory": "3g"})
    passed = request.passed({"spark.sql.shuffle.partitions": "200", "spark.driver.memory": "8g"})
    # What the user set in spark-defaults.conf is not passed, so Spark keeps the user's value.
    assert "spark.sql.shuffle.partitions" not in passed
    assert "spark.driver.memory" not in passed
    assert passed["spark.ui.enabled"] == TOOL_DEFAULTS["spark.ui.enabled"]
    assert passed["spark.executor.memory"] == "3g"
    for key, value in REQUIRED.items():
        assert passed[key] == value
    # A study or command-line setting beats the tool's default.
    ours = SessionRequest("local[2]", {"spark.sql.shuffle.partitions": "64"}).passed({})
    assert ours["spark.sql.shuffle.partitions"] == "64"
    assert ours["spark.driver.memory"] == TOOL_DEFAULTS["spark.driver.memory"]


def test_a_setting_that_changes_the_sql_is_refused() -> None:
    request = SessionRequest("local[2]", {"spark.sql.ansi.enabled": "false"})
    with pytest.raises(EngineError, match=r"spark.sql.ansi.enabled=false would change"):
        request.passed({})
    # The same value in other spelling is no contradiction.
    assert SessionRequest("local", {"spark.sql.ansi.enabled": "TRUE"}).passed({})


def test_secrets_are_never_written_down() -> None:
    shown = redact(
        {
            "spark.hadoop.fs.s3a.secret.key": "abc",
            "spark.hadoop.fs.s3a.access.key": "def",
            "spark.authenticate.secret": "ghi",
            "spark.ssl.keyPassword": "jkl",
            "spark.executor.memory": "1g",
            "spark.eventLog.dir": "/srv/spark-events",
            "spark.driver.extraJavaOptions": "-Dlog4j.configurationFile=file:/etc/l.xml",
            "spark.executor.extraJavaOptions": "-Dx=/opt/y",
            "spark.sql.shuffle.partitions": "200",
        }
    )
    assert shown == {
        "spark.authenticate.secret": REDACTED,
        "spark.driver.extraJavaOptions": MACHINE_PATH,
        "spark.eventLog.dir": MACHINE_PATH,
        "spark.executor.extraJavaOptions": MACHINE_PATH,
        "spark.executor.memory": "1g",
        "spark.hadoop.fs.s3a.access.key": REDACTED,
        "spark.hadoop.fs.s3a.secret.key": REDACTED,
        "spark.sql.shuffle.partitions": "200",
        "spark.ssl.keyPassword": REDACTED,
    }
    assert safe_master("k8s://https://user:pw@api.example:6443") == "k8s://https://api.example:6443"


def test_extract_locations_as_uris(tmp_path: Path) -> None:
    folder = tmp_path / "with space"
    assert extract_location(folder.as_uri()) == folder
    assert extract_location("file://localhost" + folder.as_posix()) == folder
    assert extract_location("plain/relative") == Path("plain/relative")
    # Other schemes stay URIs, for Spark's Hadoop file systems (tests/test_spark_hadoop.py).
    assert extract_location("hdfs://nn/x") == "hdfs://nn/x"
    with pytest.raises(ExtractError, match="not on host 'elsewhere'"):
        extract_location("file://elsewhere/x")


def test_cli_refuses_an_s3a_extract_on_duckdb_naming_it(tmp_path: Path) -> None:
    out = tmp_path / "out"
    result = CliRunner().invoke(
        app, ["build", str(DEMO_STUDY), "--extract", "s3a://bucket/orvane", "--out", str(out)]
    )
    assert result.exit_code == 2
    assert (
        "s3a://bucket/orvane [needs-spark] an extract on s3a:// is listed and read" in result.output
    )
    assert not out.exists()


def test_spark_options_need_the_spark_engine(tmp_path: Path) -> None:
    args = ["build", str(DEMO_STUDY), "--extract", str(HANDMADE), "--out", str(tmp_path / "o")]
    result = CliRunner().invoke(app, [*args, "--spark-conf", "spark.a=1"])
    assert result.exit_code == 2
    assert "need --engine spark" in result.output


def test_threads_and_memory_limit_with_a_master_url_are_said_to_be_ignored() -> None:
    notes: list[str] = []
    options = BuildOptions(
        engine="spark", spark_master="spark://127.0.0.1:7077", threads=4, memory_limit="2GB"
    )
    engine = make_engine(options, 4, "2GB", SparkSettings(), notes)
    assert engine.master == "spark://127.0.0.1:7077"  # type: ignore[union-attr]
    assert any("--threads 4 is not applied" in note for note in notes)
    assert any("--memory-limit 2GB is a DuckDB setting" in note for note in notes)
    notes.clear()
    local = make_engine(BuildOptions(engine="spark", threads=3), 3, None, SparkSettings(), notes)
    assert local.master == "local[3]"  # type: ignore[union-attr]
    assert notes == []


def test_study_spark_section(study_copy: object) -> None:
    text = DEMO_STUDY.read_text(encoding="utf-8")
    section = (
        "\nspark:\n  settings:\n    spark.sql.shuffle.partitions: 64\n"
        "    spark.sql.adaptive.enabled: false\n  connect_timeout_seconds: 12\n"
        "  stage_storage: checkpoint\n  checkpoint_folder: hdfs://shared/checkpoints\n"
    )
    study = load_study(study_copy(text + section)).study  # type: ignore[operator]
    assert study.spark.text_settings() == {
        "spark.sql.shuffle.partitions": "64",
        "spark.sql.adaptive.enabled": "false",
    }
    engine = make_engine(
        BuildOptions(engine="spark", spark_conf=("spark.sql.shuffle.partitions=8",)),
        None,
        None,
        study.spark,
    )
    assert engine.request.settings == {  # type: ignore[union-attr]
        "spark.sql.shuffle.partitions": "8",  # the command line beats the study
        "spark.sql.adaptive.enabled": "false",
    }
    assert engine.request.connect_timeout == 12  # type: ignore[union-attr]
    assert engine.checkpoint_folder == "hdfs://shared/checkpoints"  # type: ignore[union-attr]


@pytest.mark.parametrize(
    ("section", "code"),
    [
        ("spark:\n  settings:\n    shuffle: 4\n", "spark"),
        ("spark:\n  stage_storage: checkpoint\n", "checkpoint_folder"),
        ("spark:\n  connect_timeout_seconds: 0\n", "connect_timeout_seconds"),
        ("spark:\n  mastr: yarn\n", "mastr"),
    ],
)
def test_bad_spark_sections_are_located(study_copy: object, section: str, code: str) -> None:
    text = DEMO_STUDY.read_text(encoding="utf-8") + "\n" + section
    with pytest.raises(ConfigError) as caught:
        load_study(study_copy(text))  # type: ignore[operator]
    problems = caught.value.problems
    assert problems
    assert all(p.line > 0 for p in problems), [str(p) for p in problems]
    assert code in str(caught.value)
