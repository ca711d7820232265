from __future__ import annotations

import importlib.util
import os
import shutil
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from .pg_server import Server, find_bindir, running_server

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


def pytest_configure(config: pytest.Config) -> None:
    """With xdist (``-n 2``), tests of a file and all Spark tests share a process.

    See tests/_process_groups.py; without xdist (``-p no:xdist``) nothing changes.
    """
    if config.pluginmanager.hasplugin("xdist"):
        from ._process_groups import ProcessGroups

        config.pluginmanager.register(ProcessGroups(), "ascertain-process-groups")


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


@pytest.fixture(scope="session")
def pg_server() -> Iterator[Server]:
    """A throwaway PostgreSQL server for the session (see tests/pg_server.py).

    Without PostgreSQL or its driver the tests that use it skip with the reason; in CI
    (``CI=true``, where .ci/run installs both) they fail instead.
    """
    reason = None
    if find_bindir() is None:
        reason = "PostgreSQL is not installed (initdb not found; apt-get install postgresql)"
    elif importlib.util.find_spec("adbc_driver_postgresql") is None:
        reason = "the PostgreSQL driver is not installed (pip install '.[postgres]')"
    if reason is not None:
        if os.environ.get("CI") == "true":
            pytest.fail(f"CI must run the PostgreSQL tests: {reason}")
        pytest.skip(reason)
    with running_server() as server:
        yield server
