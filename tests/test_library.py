"""The definition library ships inside the package, and a study can name it (``library: true``)."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tomllib
import zipfile
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.config import load_study
from pipeline.config._library import library_conditions
from pipeline.errors import ConfigError

from .conftest import DEMO_STUDY, ROOT


def _copied_demo(folder: Path, definitions_line: str) -> Path:
    """The demo study alone in a new folder, its definitions line replaced."""
    text = DEMO_STUDY.read_text(encoding="utf-8")
    assert "definitions: ../conditions\n" in text
    text = text.replace("definitions: ../conditions\n", definitions_line)
    text = text.replace(
        "extract: ../../synthetic_extract", f"extract: {ROOT / 'synthetic_extract'}"
    )
    folder.mkdir(parents=True, exist_ok=True)
    study = folder / "study.yaml"
    study.write_text(text, encoding="utf-8")
    return study


def test_every_subpackage_is_installed() -> None:
    # The package list is written out (pyproject.toml) because pipeline.library maps to
    # definitions/; a new subpackage missing from it would be left out of the wheel.
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    listed = set(config["tool"]["setuptools"]["packages"])
    found = {
        ".".join(init.parent.relative_to(ROOT).parts)
        for init in (ROOT / "pipeline").rglob("__init__.py")
    }
    assert found | {"pipeline.library"} == listed
    assert config["tool"]["setuptools"]["package-dir"] == {"pipeline.library": "definitions"}


def test_library_holds_the_shipped_definitions() -> None:
    shipped = {p.name for p in library_conditions().glob("*.yaml")}
    assert shipped == {p.name for p in (ROOT / "definitions" / "conditions").glob("*.yaml")}
    assert "type2_diabetes.yaml" in shipped


def test_copied_study_names_the_library(tmp_path: Path) -> None:
    study = _copied_demo(tmp_path / "elsewhere", "library: true\n")
    loaded = load_study(study)
    assert loaded.study.library
    assert loaded.study.definitions == library_conditions()
    assert set(loaded.study.outcomes.conditions) <= set(loaded.catalog.conditions)


def test_copied_study_without_library_says_how(tmp_path: Path) -> None:
    study = _copied_demo(tmp_path / "elsewhere", "definitions: ../conditions\n")
    with pytest.raises(ConfigError) as err:
        load_study(study)
    message = str(err.value)
    assert "study.yaml:4:1 [missing-folder] the definitions folder" in message
    assert "'library: true' instead of 'definitions' reads the definitions shipped" in message


def test_library_and_definitions_conflict(tmp_path: Path) -> None:
    study = _copied_demo(tmp_path / "s", "definitions: ../conditions\nlibrary: true\n")
    result = CliRunner().invoke(app, ["check", str(study)])
    assert result.exit_code == 1
    assert (
        "study.yaml:5:1 [conflicting-keys] 'library: true' reads the shipped definitions; "
        "remove 'definitions' (or 'library' to read your own folder)"
    ) in result.output


@pytest.mark.slow
def test_wheel_installs_the_library(tmp_path: Path) -> None:
    # Build a wheel from a copy of the sources (a build in the checkout would leave build/
    # behind), unpack it as an installer would, and read a definition through the installed
    # package from a folder where no source checkout can be found.
    source = tmp_path / "source"
    source.mkdir()
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(ROOT / name, source / name)
    ignore = shutil.ignore_patterns("__pycache__")
    for folder in ("pipeline", "definitions"):
        shutil.copytree(ROOT / folder, source / folder, ignore=ignore)
    wheels = tmp_path / "wheels"
    subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(wheels), str(source)],
        check=True,
        capture_output=True,
    )
    (wheel,) = wheels.glob("ascertain-*.whl")
    names = zipfile.ZipFile(wheel).namelist()
    assert "pipeline/library/conditions/ckd.yaml" in names
    assert "pipeline/library/studies/orvane_multimorbidity.yaml" in names
    # the standard populations for direct standardisation are package data too
    assert "pipeline/stats/standards/esp2013.csv" in names
    assert "pipeline/stats/standards/who2000_2025.csv" in names
    installed = tmp_path / "site"
    zipfile.ZipFile(wheel).extractall(installed)
    script = (
        "import pipeline, pathlib\n"
        "from pipeline.config import load_condition\n"
        "from pipeline.config._library import library_conditions, _installed\n"
        "print(pathlib.Path(pipeline.__file__).parent)\n"
        "print(_installed())\n"
        "print(load_condition(library_conditions() / 'ckd.yaml').title)\n"
        "from pipeline.stats import shipped_standard\n"
        "print(shipped_standard('esp2013').listed_total)\n"
    )
    run = tmp_path / "elsewhere"
    run.mkdir()
    env = {**os.environ, "PYTHONPATH": str(installed)}
    out = subprocess.run(
        [sys.executable, "-c", script], cwd=run, env=env, check=True, capture_output=True, text=True
    ).stdout.splitlines()
    assert out[0] == str(installed / "pipeline")
    assert out[1] == str(installed / "pipeline" / "library")
    assert out[2] == "Chronic kidney disease, stage 3 or worse, persistent"
    assert out[3] == "100000.0"
