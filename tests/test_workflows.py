"""The workflows share one preparation: every command that runs a study gets its engine there.

Before, explain ran on one thread and validate on DuckDB's defaults whatever the study said;
now each command that runs a study's plan goes through ``prepare``, so the study's ``engine:``
settings reach the engine, and no module of the package constructs an engine anywhere else.
"""

from __future__ import annotations

import ast
from pathlib import Path
from typing import Any

import pytest

from pipeline.engine import DuckDBEngine
from pipeline.stats._disclosure import hidden_marker, shown
from pipeline.workflows.check import unmatched_in_extract
from pipeline.workflows.codes import audit_codes
from pipeline.workflows.explain import explain_patient
from pipeline.workflows.prepare import BuildOptions, prepare
from pipeline.workflows.validate import render_validation, validate_study

from .conftest import DEMO_STUDY, HANDMADE
from .helpers import demo_study_variant

PACKAGE = Path(__file__).resolve().parents[1] / "pipeline"


@pytest.fixture
def study(tmp_path: Path) -> Path:
    """The demo study with engine settings of its own (none are DuckDB's defaults)."""
    file = demo_study_variant(tmp_path / "study")
    with file.open("a", encoding="utf-8") as out:
        out.write("\nengine: {threads: 2, memory_limit: 700MB}\n")
    return file


@pytest.fixture
def engines(monkeypatch: pytest.MonkeyPatch) -> list[tuple[Any, ...]]:
    """The settings of every DuckDB engine that runs a plan during the test."""
    seen: list[tuple[Any, ...]] = []
    run = DuckDBEngine.run

    def recording(self: DuckDBEngine, *args: Any, **kwargs: Any) -> Any:
        seen.append((self.threads, self.memory_limit, self.memory_limit_from))
        return run(self, *args, **kwargs)

    monkeypatch.setattr(DuckDBEngine, "run", recording)
    return seen


def _reference(tmp_path: Path) -> Path:
    reference = tmp_path / "reference.csv"
    reference.write_text(
        "# coverage: reviewed\npatient_id,condition,status\nHM-001,type2_diabetes,1\n",
        encoding="utf-8",
    )
    return reference


@pytest.mark.parametrize(
    "command",
    [
        pytest.param(lambda s, _: explain_patient(s, "HM-001", extract=HANDMADE), id="explain"),
        pytest.param(
            lambda s, t: validate_study(s, _reference(t), extract=HANDMADE), id="validate"
        ),
        pytest.param(lambda s, _: audit_codes(s, HANDMADE), id="codes"),
        pytest.param(lambda s, _: unmatched_in_extract(s, HANDMADE), id="check"),
    ],
)
def test_commands_run_with_the_study_engine_settings(
    command: Any, study: Path, tmp_path: Path, engines: list[tuple[Any, ...]]
) -> None:
    command(study, tmp_path)
    assert engines == [(2, "700MB", "study")]


def test_command_line_settings_win_over_the_study(study: Path) -> None:
    options = BuildOptions(extract=HANDMADE, threads=3, memory_limit="900MB")
    engine = prepare(study, options).engine
    assert isinstance(engine, DuckDBEngine)
    assert (engine.threads, engine.memory_limit, engine.memory_limit_from) == (3, "900MB", "option")


def _constructions(path: Path) -> list[str]:
    """Where a module calls an engine class (``DuckDBEngine(...)``, ``SparkEngine(...)``)."""
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Call):
            name = getattr(node.func, "id", None) or getattr(node.func, "attr", None)
            if name in ("DuckDBEngine", "SparkEngine"):
                found.append(f"{path.relative_to(PACKAGE)}:{node.lineno}")
    return found


def test_engines_are_constructed_in_one_place() -> None:
    found = [where for path in sorted(PACKAGE.rglob("*.py")) for where in _constructions(path)]
    assert [where.split(":")[0] for where in found] == ["workflows/prepare.py"] * 2, found


@pytest.mark.parametrize(
    ("value", "hidden", "text"),
    [(3, True, "<5"), (0, True, "*"), (12, True, "*"), (3, False, "3"), (12, False, "12")],
)
def test_one_marking_of_hidden_counts(value: int, *, hidden: bool, text: str) -> None:
    assert shown(value, "k", frozenset({"k"} if hidden else ()), 5) == text
    if hidden:
        assert hidden_marker(value, 5) == text


def test_validate_marks_hidden_counts_as_the_report_does(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    patients = (HANDMADE / "patients.csv").read_text(encoding="utf-8").splitlines()[1:9]
    reference = tmp_path / "reference.csv"
    reference.write_text(
        "# coverage: complete\npatient_id,condition,status\n"
        + "".join(f"{line.split(',')[0]},type2_diabetes,1\n" for line in patients),
        encoding="utf-8",
    )
    results = validate_study(DEMO_STUDY, reference, extract=HANDMADE)
    # A few true positives among 40 patients: tp is small (<5), and the other three cells
    # are hidden so that it cannot be worked out from the 40 (*), as the report marks them.
    assert render_validation(results, 5).startswith("type2_diabetes: tp <5, fp *, fn *, tn *\n")
    # The marking is the shared one: validate has none of its own.
    monkeypatch.setattr("pipeline.workflows.validate.shown_count", lambda *_: "#")
    assert render_validation(results, 5).startswith("type2_diabetes: tp #, fp #, fn #, tn #\n")
