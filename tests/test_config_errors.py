"""Bad configuration gives located, plain messages, exit code 2, and writes nothing."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.config import load_study
from pipeline.errors import ConfigError

from .conftest import DEMO_STUDY, HANDMADE

DEMO_TEXT = DEMO_STUDY.read_text(encoding="utf-8")


def _line_of(text: str, needle: str) -> int:
    return next(i for i, line in enumerate(text.splitlines(), start=1) if needle in line)


def _problems(path: Path) -> list[str]:
    with pytest.raises(ConfigError) as caught:
        load_study(path)
    return [str(p) for p in caught.value.problems]


def test_typo_in_key_names_line_and_suggests(study_copy: Callable[..., Path]) -> None:
    text = DEMO_TEXT.replace("horizon_days: 1461", "horizon_dayz: 1461")
    path = study_copy(text)
    line = _line_of(text, "horizon_dayz")
    assert _problems(path) == [
        f"{path}:{line}:3 [unknown-key] unknown key 'horizon_dayz'; did you mean 'horizon_days'?",
    ]


def test_missing_horizon(study_copy: Callable[..., Path]) -> None:
    text = DEMO_TEXT.replace("  horizon_days: 1461\n", "")
    path = study_copy(text)
    line = _line_of(text, "outcomes:")
    assert _problems(path) == [
        f"{path}:{line}:1 [bad-value] outcomes: the horizon is missing: give horizon_days or "
        "horizon_years"
    ]


def test_wrong_type(study_copy: Callable[..., Path]) -> None:
    text = DEMO_TEXT.replace("horizon_days: 1461", "horizon_days: four years")
    path = study_copy(text)
    line = _line_of(text, "horizon_days")
    (problem,) = _problems(path)
    assert problem.startswith(f"{path}:{line}:17 [bad-value] outcomes.horizon_days: ")
    assert "integer" in problem


def test_unknown_outcome_condition(study_copy: Callable[..., Path]) -> None:
    text = DEMO_TEXT.replace(
        "[type2_diabetes, ckd, heart_failure]", "[type2_diabetes, ckd, heart_fail]"
    )
    path = study_copy(text)
    line = _line_of(text, "heart_fail]")
    (problem,) = _problems(path)
    assert problem.startswith(f"{path}:{line}:")
    assert problem.endswith(
        "[unknown-condition] outcome 'heart_fail' is not defined in "
        f"{path.parent.parent / 'conditions'}; did you mean 'heart_failure'?"
    )


def _conditions(study: Path) -> Path:
    return study.parent.parent / "conditions"


def test_unknown_evidence_in_rule(study_copy: Callable[..., Path]) -> None:
    path = study_copy(DEMO_TEXT)
    hf = _conditions(path) / "heart_failure.yaml"
    text = hf.read_text(encoding="utf-8").replace("need: {hf_code: 2}", "need: {hf_cod: 2}")
    hf.write_text(text, encoding="utf-8")
    line = _line_of(text, "hf_cod: 2")
    column = text.splitlines()[line - 1].index("hf_cod") + 1
    assert _problems(path) == [
        f"{hf}:{line}:{column} [unknown-evidence] rule 'two heart failure codes' needs 'hf_cod', "
        "which is not defined under evidence; did you mean 'hf_code'?"
    ]


def test_negative_window(study_copy: Callable[..., Path]) -> None:
    path = study_copy(DEMO_TEXT)
    hf = _conditions(path) / "heart_failure.yaml"
    text = hf.read_text(encoding="utf-8").replace("within_days: 365", "within_days: -5")
    hf.write_text(text, encoding="utf-8")
    line = _line_of(text, "within_days: -5")
    column = text.splitlines()[line - 1].index("-5") + 1
    assert _problems(path) == [
        f"{hf}:{line}:{column} [bad-value] rules[1].within_days: must be 0 or more (got -5)"
    ]


def test_duplicate_condition_name(study_copy: Callable[..., Path]) -> None:
    path = study_copy(DEMO_TEXT)
    folder = _conditions(path)
    copy = folder / "heart_failure_copy.yaml"
    copy.write_text((folder / "heart_failure.yaml").read_text(encoding="utf-8"), "utf-8")
    assert _problems(path) == [
        f"{copy}:1:1 [duplicate-condition] condition 'heart_failure' is already defined in "
        f"{folder / 'heart_failure.yaml'}"
    ]


def test_duplicate_yaml_key(study_copy: Callable[..., Path]) -> None:
    text = DEMO_TEXT.replace(
        "end_of_data: 2019-12-31", "end_of_data: 2019-12-31\nend_of_data: 2018-12-31"
    )
    path = study_copy(text)
    line = _line_of(text, "end_of_data: 2018")
    assert _problems(path) == [f"{path}:{line}:1 [duplicate-key] key 'end_of_data' appears twice"]


def test_invalid_yaml(study_copy: Callable[..., Path]) -> None:
    path = study_copy(DEMO_TEXT.replace("index:\n", "index: [\n"))
    (problem,) = _problems(path)
    assert "[bad-yaml] not valid YAML" in problem
    assert problem.startswith(f"{path}:")


def test_several_problems_are_reported_together(study_copy: Callable[..., Path]) -> None:
    text = DEMO_TEXT.replace("horizon_days: 1461", "horizon_days: -1").replace(
        "  - alive_at_index: true", "  - alive_at_indx: true"
    )
    codes = [p.split("[")[1].split("]")[0] for p in _problems(study_copy(text))]
    assert sorted(codes) == ["bad-value", "unknown-key"]


def test_cli_prints_error_exits_2_and_writes_nothing(
    study_copy: Callable[..., Path], tmp_path: Path
) -> None:
    from pipeline.cli import app

    out = tmp_path / "out"
    path = study_copy(DEMO_TEXT.replace("horizon_days: 1461", "horizon_dayz: 1461"))
    result = CliRunner().invoke(
        app, ["build", str(path), "--extract", str(HANDMADE), "--out", str(out)]
    )
    assert result.exit_code == 2
    assert "did you mean 'horizon_days'?" in result.output
    assert "Traceback" not in result.output
    assert not out.exists()


def test_failed_build_leaves_existing_output_untouched(
    study_copy: Callable[..., Path], tmp_path: Path
) -> None:
    from pipeline.cli import app

    out = tmp_path / "out"
    out.mkdir()
    (out / "cohort.parquet").write_bytes(b"previous run")
    path = study_copy(DEMO_TEXT.replace("lookback: all", "lookback: some"))
    result = CliRunner().invoke(
        app, ["build", str(path), "--extract", str(HANDMADE), "--out", str(out)]
    )
    assert result.exit_code == 2
    assert sorted(p.name for p in out.iterdir()) == ["cohort.parquet"]
    assert (out / "cohort.parquet").read_bytes() == b"previous run"


@pytest.mark.parametrize("command", ["build", "sql"])
def test_the_command_line_prints_the_stable_code(
    study_copy: Callable[..., Path], command: str
) -> None:
    """The error line keeps its ``[code]`` (it was once eaten as terminal markup)."""
    path = study_copy(DEMO_TEXT.replace("horizon_days: 1461", "horizon_dayz: 1461"))
    result = CliRunner().invoke(app, [command, str(path)])
    assert result.exit_code == 2
    assert "[unknown-key] unknown key 'horizon_dayz'" in " ".join(result.output.split())
