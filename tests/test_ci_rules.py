"""CI checks what the project promises: style and import bans, the whole suite, no silent skips.

``.ci/run`` runs exactly the README's test command; these tests pin what that command does.
"""

from __future__ import annotations

import shutil
import subprocess
import tomllib
import types
from pathlib import Path

import pytest

from ._process_groups import (
    SPARK,
    FileAndSparkScheduling,
    check_spark_units,
    read_spark_tests_of,
    unit_of,
)
from .conftest import ROOT
from .helpers import in_ci, require


def _readme_test_command() -> str:
    """The command ``.ci/run`` extracts from README.md, extracted by ``.ci/run``'s own awk."""
    run = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    (line,) = [x for x in run.splitlines() if x.startswith("command=$(awk ")]
    program = line.split("'")[1]
    awk = shutil.which("awk")
    require(awk, "no awk to read the test command the way .ci/run does")
    assert awk is not None
    done = subprocess.run(
        [awk, program, "README.md"], cwd=ROOT, capture_output=True, text=True, check=True
    )
    return done.stdout.strip()


def test_ci_command_checks_style_before_running_the_whole_suite() -> None:
    command = _readme_test_command()
    steps = [step.strip() for step in command.split("&&")]
    assert steps == [
        'python -m pip install ".[test]"',
        "ruff check .",
        "ruff format --check .",
        # two processes, a fixed number: -n auto would follow the machine's cores and memory
        "python -m pytest -n 2",
    ]
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    assert "pytest-xdist" in " ".join(config["project"]["optional-dependencies"]["test"])


def test_ruff_enforces_the_import_bans_and_complexity_and_skips_ci_venvs() -> None:
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    ruff = config["tool"]["ruff"]
    assert {"TID", "C90"} <= set(ruff["lint"]["select"])
    assert "duckdb" in ruff["lint"]["flake8-tidy-imports"]["banned-api"]
    assert ruff["lint"]["mccabe"]["max-complexity"] <= 12
    # .ci/run creates .ci-venv inside the repository: linting it would fail on installed code.
    assert {".ci-venv", ".venv"} <= set(ruff["extend-exclude"])
    assert "ruff" in " ".join(config["project"]["optional-dependencies"]["test"])


def test_ruff_really_finds_a_banned_import(tmp_path) -> None:  # type: ignore[no-untyped-def]
    # The ban is real only if ruff, run with this configuration, flags it outside the engine.
    ruff = pytest.importorskip("ruff")
    module = ROOT / "pipeline" / "compile"
    probe = tmp_path / "probe.py"
    probe.write_text('"""Probe."""\n\nimport duckdb\n\nduckdb.sql("select 1")\n', encoding="utf-8")
    binary = ruff.find_ruff_bin()  # type: ignore[attr-defined]
    done = subprocess.run(
        [binary, "check", "--config", str(ROOT / "pyproject.toml"), "--select", "TID251",
         "--stdin-filename", str(module / "probe.py"), "-"],
        input=probe.read_text(encoding="utf-8"), capture_output=True, text=True, check=False,
    )  # fmt: skip
    assert done.returncode == 1, done.stdout + done.stderr
    assert "TID251" in done.stdout


@pytest.mark.parametrize(("ci", "expected"), [("true", True), ("TRUE", True), ("", False)])
def test_in_ci_reads_the_ci_variable(
    monkeypatch: pytest.MonkeyPatch, ci: str, expected: bool
) -> None:
    monkeypatch.setenv("CI", ci)
    assert in_ci() is expected


def test_a_missing_tool_skips_locally(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("CI", raising=False)
    with pytest.raises(pytest.skip.Exception, match="no Java"):
        require(None, "no Java runtime")
    require("/usr/bin/java", "no Java runtime")  # found: nothing happens


def test_a_missing_tool_fails_in_ci(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("CI", "true")
    with pytest.raises(pytest.fail.Exception, match=r"no chromium.*CI=true"):
        require(None, "no chromium")
    require(True, "no chromium")


def test_a_file_stays_in_one_process_and_spark_tests_share_one() -> None:
    spark = read_spark_tests_of(ROOT)
    # a whole file through pytestmark, single tests through their decorator
    assert "tests/test_spark.py" in spark
    assert "tests/test_spark_cluster.py" in spark
    assert "tests/test_exposure.py::test_spark_writes_the_same_files_for_the_example_study" in spark
    assert "tests/test_spark_hadoop.py" not in spark  # its tests without Spark stay apart
    assert unit_of("tests/test_spark.py::test_x[a-b]", spark) == SPARK
    assert unit_of("tests/test_persontime.py::test_spark_writes_the_same_bytes", spark) == SPARK
    assert unit_of("tests/test_persontime.py::test_cells_match_the_hand_computed_table", spark) == (
        "tests/test_persontime.py"
    )
    assert unit_of("pipeline/stats/_x.py::pipeline.stats._x.f", spark) == "pipeline/stats/_x.py"


def test_every_collected_spark_test_joins_the_spark_unit(request: pytest.FixtureRequest) -> None:
    # The whole suite's collection when the whole suite runs (the README command).
    items = request.session.items
    assert request.node in items
    check_spark_units(items, read_spark_tests_of(ROOT))


class _Item:
    """Just what :func:`check_spark_units` reads of a collected test."""

    def __init__(self, nodeid: str, *marks: pytest.MarkDecorator) -> None:
        self.nodeid = nodeid
        self.marks = [m.mark for m in marks]

    def get_closest_marker(self, name: str) -> pytest.Mark | None:
        return next((m for m in self.marks if m.name == name), None)


def test_a_spark_test_the_reading_misses_fails_the_run(tmp_path: Path) -> None:
    tests = tmp_path / "tests"
    tests.mkdir()
    (tests / "test_a.py").write_text(
        "import pytest\n\npytestmark = [pytest.mark.spark, pytest.mark.slow]\n", encoding="utf-8"
    )
    (tests / "test_b.py").write_text(
        "import pytest\n\n@pytest.mark.spark\ndef test_on_spark():\n    pass\n\n"
        "@pytest.mark.parametrize('x', [pytest.param(1, marks=pytest.mark.spark)])\n"
        "def test_hidden(x):\n    pass\n",
        encoding="utf-8",
    )
    spark = read_spark_tests_of(tmp_path)
    assert spark == {"tests/test_a.py", "tests/test_b.py::test_on_spark"}
    seen = [
        _Item("tests/test_a.py::test_one", pytest.mark.spark),
        _Item("tests/test_b.py::test_on_spark[x]", pytest.mark.spark),
        _Item("tests/test_b.py::test_plain"),
    ]
    check_spark_units(seen, spark)  # type: ignore[arg-type]
    hidden = _Item("tests/test_b.py::test_hidden[1]", pytest.mark.spark)
    with pytest.raises(pytest.UsageError, match=r"test_b.py::test_hidden\[1\]"):
        check_spark_units([*seen, hidden], spark)  # type: ignore[list-item]


class _Config:
    """What xdist's scope scheduler reads of the configuration: two processes, the root."""

    def __init__(self, root: Path) -> None:
        self.rootpath = root
        self.option = types.SimpleNamespace(loadscopereorder=True)

    def getvalue(self, name: str) -> object:
        assert name == "tx"
        return ["2*popen"]


class _Process:
    """A stand-in for one xdist worker: records the tests it is sent."""

    def __init__(self, name: str, collection: list[str]) -> None:
        self.gateway = types.SimpleNamespace(id=name)
        self.shutting_down = False
        self.collection = collection
        self.sent: list[str] = []

    def send_runtest_some(self, indices: list[int]) -> None:
        self.sent += [self.collection[i] for i in indices]

    def shutdown(self) -> None:
        pass


def test_the_spark_unit_goes_first_and_files_stay_whole(tmp_path: Path) -> None:
    tests = tmp_path / "tests"
    tests.mkdir()
    (tests / "test_s.py").write_text("import pytest\n\npytestmark = pytest.mark.spark\n")
    collection = [
        *(f"tests/test_many.py::test_{i}" for i in range(6)),  # the most tests
        *(f"tests/test_few.py::test_{i}" for i in range(3)),
        "tests/test_s.py::test_a",
        "tests/test_s.py::test_b",
    ]
    scheduler = FileAndSparkScheduling(_Config(tmp_path))  # type: ignore[arg-type]
    first, second = _Process("gw0", collection), _Process("gw1", collection)
    for process in (first, second):
        scheduler.add_node(process)  # type: ignore[arg-type]
        scheduler.add_node_collection(process, collection)  # type: ignore[arg-type]
    scheduler.schedule()
    assert first.sent[:2] == ["tests/test_s.py::test_a", "tests/test_s.py::test_b"]
    assert sorted(first.sent + second.sent) == sorted(collection)
    for file in ("test_many", "test_few", "test_s"):
        assert len({p for p in (first, second) for t in p.sent if file + ".py" in t}) == 1
