"""Generated column names that would meet in the analysis table are refused at load.

``pipeline/config/_columns.py`` lists every column the study's names make (outcomes, covariates,
the exposure section, as-treated follow-up); a second maker of a column gets a located
``duplicate-column`` problem. The study is the new-user design fixture.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from pipeline.config import load_study
from pipeline.errors import ConfigError

FIXTURE = Path(__file__).parent / "fixtures" / "designs" / "new_users"
DEFINITIONS = Path(__file__).resolve().parents[1] / "definitions"


def _study(tmp_path: Path, *changes: tuple[str, str]) -> Path:
    """The fixture's study with ``changes``; definitions copied, plus ``heart_failure_as_treated``.

    The extra condition is heart failure under another name, so an outcome list can name both.
    """
    folder = tmp_path / "new_users"
    shutil.copytree(FIXTURE, folder)
    shutil.copytree(DEFINITIONS, tmp_path / "definitions")
    conditions = tmp_path / "definitions" / "conditions"
    hf = (conditions / "heart_failure.yaml").read_text(encoding="utf-8")
    twin = hf.replace("condition: heart_failure\n", "condition: heart_failure_as_treated\n", 1)
    (conditions / "heart_failure_as_treated.yaml").write_text(twin, encoding="utf-8")
    study = folder / "study.yaml"
    text = study.read_text(encoding="utf-8").replace("../../../../definitions", "../definitions")
    for old, new in changes:
        assert old in text
        text = text.replace(old, new)
    study.write_text(text, encoding="utf-8")
    return study


def _clashes(study: Path) -> list[tuple[str, str, int, str]]:
    """Each duplicate-column problem: (line's text, message, column, file name)."""
    with pytest.raises(ConfigError) as err:
        load_study(study)
    lines = study.read_text(encoding="utf-8").splitlines()
    found = [
        (lines[p.line - 1], p.message, p.column, Path(p.file).name)
        for p in err.value.problems
        if p.code == "duplicate-column"
    ]
    assert found, [str(p) for p in err.value.problems]
    return found


BOTH = ("conditions: [heart_failure]", "conditions: [heart_failure, heart_failure_as_treated]")


def test_an_outcome_spelling_another_outcomes_as_treated_columns_is_refused(
    tmp_path: Path,
) -> None:
    [(line, message, column, file)] = _clashes(_study(tmp_path, BOTH))
    assert file == "study.yaml"
    assert line.strip() == "conditions: [heart_failure, heart_failure_as_treated]"
    assert line[column - 1 :].startswith("heart_failure_as_treated")  # the second outcome
    assert "incident_heart_failure_as_treated" in message
    assert "time_heart_failure_as_treated" in message
    assert "outcome 'heart_failure'" in message


def test_the_same_outcomes_load_without_as_treated_follow_up(tmp_path: Path) -> None:
    study = _study(tmp_path, BOTH, ("  as_treated: true\n", ""))
    assert load_study(study).study.outcomes.conditions[1] == "heart_failure_as_treated"


@pytest.mark.parametrize(
    "covariate", ["time_heart_failure", "event_heart_failure", "event_heart_failure_as_treated"]
)
def test_a_covariate_named_as_a_time_or_event_column_is_refused(
    tmp_path: Path, covariate: str
) -> None:
    study = _study(
        tmp_path, ("outcomes:", f"covariates:\n  {covariate}: {{condition: ckd}}\n\noutcomes:")
    )
    [(line, message, _, _)] = _clashes(study)
    assert line.strip().startswith(f"{covariate}:")
    assert f"covariate '{covariate}' makes column(s) {covariate}," in message
