"""Spark on a real standalone cluster: a master and a worker started from the installed pyspark.

The cluster runs on 127.0.0.1 with free ports (``spark-class`` starts
``org.apache.spark.deploy.master.Master`` and ``...worker.Worker``, one core and 1 GB), the
builds run as the ``ascertain`` command in their own processes (one JVM may hold only one
Spark context, and a test's session must not be reused), and both cluster processes are stopped
by their ids afterwards. The unreachable-master messages need no cluster.
"""

from __future__ import annotations

import importlib.util
import json
import os
import re
import shutil
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.engine._spark_session import START_ALLOWANCE
from pipeline.outputs import DATA_FILES

from .conftest import DEMO_STUDY, HANDMADE

_NO_PYSPARK = importlib.util.find_spec("pyspark") is None
_NO_JAVA = shutil.which("java") is None and not os.environ.get("JAVA_HOME")

pytestmark = [
    pytest.mark.spark,
    pytest.mark.skipif(_NO_PYSPARK, reason="pyspark is not installed (ascertain[spark])"),
    pytest.mark.skipif(_NO_JAVA, reason="no Java runtime for Spark (install a JDK 17)"),
]

COMPARED = DATA_FILES  # every data file a build writes


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def _environment() -> dict[str, str]:
    import pyspark

    return {
        **os.environ,
        "SPARK_HOME": str(Path(pyspark.__file__).parent),
        "SPARK_LOCAL_IP": "127.0.0.1",
        "PYSPARK_PYTHON": sys.executable,
    }


def _ascertain(*args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    """The command line in a process of its own, as a user runs it."""
    command = [sys.executable, "-c", "from pipeline.cli import app; app()", *args]
    return subprocess.run(
        command, capture_output=True, text=True, env=env or _environment(), timeout=900, check=False
    )


def _wait_for(log: Path, text: str, process: subprocess.Popen[bytes], seconds: float) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if text in log.read_text(errors="replace"):
            return
        if process.poll() is not None:
            break
        time.sleep(0.5)
    raise AssertionError(f"{text!r} not seen in {log.name}:\n{log.read_text(errors='replace')}")


def _stop(process: subprocess.Popen[bytes]) -> None:
    """Stop one process we started, by its id: politely, then for certain."""
    if process.poll() is None:
        process.terminate()
        try:
            process.wait(timeout=30)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=30)


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """A standalone master and one worker (1 core, 1 GB) on 127.0.0.1; yields the master URL."""
    import pyspark

    spark_class = Path(pyspark.__file__).parent / "bin" / "spark-class"
    folder = tmp_path_factory.mktemp("cluster")
    port = _free_port()
    url = f"spark://127.0.0.1:{port}"
    started: list[subprocess.Popen[bytes]] = []
    try:
        master_log = folder / "master.log"
        with master_log.open("wb") as out:
            started.append(
                subprocess.Popen(
                    [
                        str(spark_class),
                        "org.apache.spark.deploy.master.Master",
                        *("--host", "127.0.0.1", "--port", str(port)),
                        *("--webui-port", str(_free_port())),
                    ],
                    stdout=out,
                    stderr=subprocess.STDOUT,
                    env=_environment(),
                )
            )
        _wait_for(master_log, "I have been elected leader", started[0], 180)
        worker_log = folder / "worker.log"
        with worker_log.open("wb") as out:
            started.append(
                subprocess.Popen(
                    [
                        str(spark_class),
                        "org.apache.spark.deploy.worker.Worker",
                        *("--host", "127.0.0.1", "--port", str(_free_port())),
                        *("--webui-port", str(_free_port()), "--cores", "1", "--memory", "1g"),
                        *("--work-dir", str(folder / "work"), url),
                    ],
                    stdout=out,
                    stderr=subprocess.STDOUT,
                    env=_environment(),
                )
            )
        _wait_for(worker_log, "Successfully registered with master", started[1], 180)
        yield url
    finally:
        for process in reversed(started):
            _stop(process)


@pytest.mark.slow
def test_cluster_build_is_byte_identical_to_duckdb(cluster: str, tmp_path: Path) -> None:
    duck = tmp_path / "duckdb"
    result = CliRunner().invoke(
        app, ["build", str(DEMO_STUDY), "--extract", str(HANDMADE), "--out", str(duck), "--quiet"]
    )
    assert result.exit_code == 0, result.output
    spark = tmp_path / "spark"
    run = _ascertain(
        "build",
        str(DEMO_STUDY),
        "--extract",
        HANDMADE.as_uri(),  # a file:// URI is a local path
        "--out",
        str(spark),
        "--engine",
        "spark",
        "--spark-master",
        cluster,
        "--spark-conf",
        "spark.sql.shuffle.partitions=3",
        "--spark-conf",
        "spark.executor.memory=512m",
        "--quiet",
    )
    assert run.returncode == 0, run.stderr[-3000:]
    for name in COMPARED:
        assert (spark / name).read_bytes() == (duck / name).read_bytes(), name
    # The settings in effect, as read back from the running session, are recorded.
    recorded = json.loads((spark / "run.json").read_text())["engine"]
    assert recorded["master"] == cluster
    assert recorded["settings"]["spark.sql.shuffle.partitions"] == "3"
    assert recorded["settings"]["spark.executor.memory"] == "512m"
    assert recorded["settings"]["spark.sql.ansi.enabled"] == "true"
    manifest = json.loads((spark / "manifest.json").read_text())
    assert manifest["engine"]["master"] == cluster
    assert manifest["outputs"] == json.loads((duck / "manifest.json").read_text())["outputs"]


def test_an_unreachable_master_is_one_sentence_and_exit_2(tmp_path: Path) -> None:
    master = f"spark://127.0.0.1:{_free_port()}"  # nothing listens there
    out = tmp_path / "out"
    started = time.monotonic()
    run = _ascertain(
        "build",
        str(DEMO_STUDY),
        "--extract",
        str(HANDMADE),
        "--out",
        str(out),
        "--engine",
        "spark",
        "--spark-master",
        master,
    )
    assert run.returncode == 2, run.stderr
    assert f"cannot reach the Spark master {master}" in run.stderr
    assert "Traceback" not in run.stderr
    assert len(run.stderr.strip().splitlines()) <= 3, run.stderr
    assert time.monotonic() - started < 60
    assert not out.exists()


@pytest.mark.parametrize(
    ("master", "said"),
    [
        ("bogus", "'bogus' is not a Spark master URL"),
        ("spark://127.0.0.1", "needs HOST:PORT after spark://"),
        ("spark://127.0.0.1:notaport", "needs HOST:PORT after spark://"),
    ],
)
def test_a_malformed_master_url_is_refused_before_any_work(
    master: str, said: str, tmp_path: Path
) -> None:
    out = tmp_path / "out"
    args = ["build", str(DEMO_STUDY), "--extract", str(HANDMADE), "--out", str(out)]
    result = CliRunner().invoke(app, [*args, "--engine", "spark", "--spark-master", master])
    assert result.exit_code == 2
    assert said in result.output
    assert not out.exists()


def test_a_silent_master_is_given_up_within_the_connect_timeout(
    study_copy: object, tmp_path: Path
) -> None:
    """A port that accepts connections but never answers as a Spark master."""
    text = DEMO_STUDY.read_text(encoding="utf-8")
    study = study_copy(  # type: ignore[operator]
        text + "\nspark:\n  connect_timeout_seconds: 5\n", "silent.yaml"
    )
    with socket.socket() as listener:
        listener.bind(("127.0.0.1", 0))
        listener.listen(8)
        master = f"spark://127.0.0.1:{listener.getsockname()[1]}"
        started = time.monotonic()
        run = _ascertain(
            "build",
            str(study),
            "--extract",
            str(HANDMADE),
            "--out",
            str(tmp_path / "out"),
            "--engine",
            "spark",
            "--spark-master",
            master,
        )
        took = time.monotonic() - started
    assert run.returncode == 2, run.stderr
    # Given up after 5 s + the start allowance, or by Spark's own client (about 60 s).
    said = re.search(
        r"error: \[spark-master-(timeout|refused)\] the Spark master (\S+) ", run.stderr
    )
    assert said, run.stderr
    assert said.group(2) == master
    assert "Traceback" not in run.stderr
    assert took < 5 + START_ALLOWANCE + 60
    assert not (tmp_path / "out").exists()
