from __future__ import annotations

import shutil
from collections.abc import Callable
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
DEMO_STUDY = ROOT / "definitions" / "studies" / "orvane_multimorbidity.yaml"
HANDMADE = ROOT / "tests" / "fixtures" / "handmade"


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption(
        "--update-golden",
        action="store_true",
        default=False,
        help="rewrite golden files from the current output instead of comparing",
    )


@pytest.fixture
def update_golden(request: pytest.FixtureRequest) -> bool:
    return bool(request.config.getoption("--update-golden"))


@pytest.fixture
def study_copy(tmp_path: Path) -> Callable[[str], Path]:
    """Copy the demo definitions into tmp_path and return a writer for a patched study file.

    The returned function takes the study YAML text (with {extract} and {out} placeholders
    already filled by the caller) and writes it next to a copy of the condition files.
    """
    definitions = tmp_path / "definitions"
    shutil.copytree(ROOT / "definitions", definitions)

    def write(text: str, name: str = "study.yaml") -> Path:
        path = definitions / "studies" / name
        path.write_text(text, encoding="utf-8")
        return path

    return write
