"""Which tests share a process when the suite runs on two (``pytest -n 2``, the README command).

pytest-xdist hands out work in units. Here a unit is a whole test file, so a file's module
fixtures (a demo build, a synthetic extract, a PostgreSQL server) are made once, as in a
serial run, and every Spark test, whatever its file, joins one ``spark`` unit: one process
then holds the only Java runtime (Spark's driver, and the local cluster's master and worker),
so two JVMs never compete for the two cores and the memory at once.

xdist's own ``--dist loadgroup`` would say the same with ``xdist_group`` marks, but from
pytest 9.2 it silently ignores them (it renames node ids, which pytest no longer lets it do;
pytest-xdist issue 1386), so the units are decided here, in the controller, from the test
files' text: the controller collects no tests and never sees a mark. A test checks every
collected Spark test against that reading (:func:`check_spark_units`), so a Spark mark this
reading misses fails the suite instead of quietly splitting the Spark tests.
"""

from __future__ import annotations

import ast
from collections.abc import Iterable
from pathlib import Path

import pytest
from xdist.scheduler import LoadScopeScheduling

SPARK = "spark"


def _is_spark_mark(node: ast.expr) -> bool:
    """``pytest.mark.spark``, written as a decorator or in a module's ``pytestmark``."""
    return ast.unparse(node) == "pytest.mark.spark"


def spark_tests(root: Path, files: Iterable[Path]) -> set[str]:
    """The Spark tests in ``files``: a whole file (``tests/x.py``) or one test (``...::name``).

    A file is whole when its ``pytestmark`` holds ``pytest.mark.spark``; otherwise each
    function decorated with it counts (parametrized cases share the function's unit).
    """
    found: set[str] = set()
    for path in files:
        name = path.relative_to(root).as_posix()
        tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
        for node in tree.body:
            if isinstance(node, ast.Assign) and any(
                isinstance(t, ast.Name) and t.id == "pytestmark" for t in node.targets
            ):
                marks = node.value.elts if isinstance(node.value, ast.List) else [node.value]
                if any(_is_spark_mark(m) for m in marks):
                    found.add(name)
            elif isinstance(node, ast.FunctionDef) and any(
                _is_spark_mark(d) for d in node.decorator_list
            ):
                found.add(f"{name}::{node.name}")
    return found


def unit_of(nodeid: str, spark: set[str]) -> str:
    """The work unit of one test: ``spark`` for a Spark test, else its file."""
    file = nodeid.split("::", 1)[0]
    function = nodeid.split("[", 1)[0]
    return SPARK if file in spark or function in spark else file


def read_spark_tests_of(root: Path) -> set[str]:
    """The Spark tests under ``root/tests``, read from the files' text."""
    return spark_tests(root, sorted((root / "tests").glob("test_*.py")))


def check_spark_units(items: Iterable[pytest.Item], spark: set[str]) -> None:
    """Fail when a collected Spark test would not join the ``spark`` unit.

    Raises:
        pytest.UsageError: A test carries the ``spark`` mark in a way the controller's reading
            of the files does not see (e.g. ``pytest.param(..., marks=...)``).
    """
    missed = [
        item.nodeid
        for item in items
        if item.get_closest_marker("spark") is not None and unit_of(item.nodeid, spark) != SPARK
    ]
    if missed:
        raise pytest.UsageError(
            f"Spark tests outside the one Spark process: {', '.join(missed)}; mark them with "
            "@pytest.mark.spark on the function or pytestmark (tests/_process_groups.py)"
        )


class FileAndSparkScheduling(LoadScopeScheduling):
    """xdist's scope scheduling with :func:`unit_of` as the scope, the Spark unit first.

    xdist hands out the units with the most tests first; the Spark unit is the longest by
    time (Java start-ups, a standalone cluster), so it starts first, and the other process
    works through the files meanwhile instead of waiting for it at the end.
    """

    def __init__(self, config: pytest.Config, log: object = None) -> None:
        super().__init__(config, log)  # type: ignore[arg-type]
        self.spark = read_spark_tests_of(config.rootpath)

    def _split_scope(self, nodeid: str) -> str:
        return unit_of(nodeid, self.spark)

    def _assign_work_unit(self, node: object) -> None:
        if SPARK in self.workqueue:
            self.workqueue.move_to_end(SPARK, last=False)
        super()._assign_work_unit(node)  # type: ignore[arg-type]


class ProcessGroups:
    """The plugin ``tests/conftest.py`` registers when xdist is loaded."""

    @pytest.hookimpl(tryfirst=True)
    def pytest_xdist_make_scheduler(self, config: pytest.Config, log: object) -> object:
        """Our units for ``-n 2`` (xdist's default ``--dist load``); any other --dist is kept."""
        if config.getvalue("dist") != "load":
            return None
        return FileAndSparkScheduling(config, log)
