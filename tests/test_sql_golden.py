"""Golden files of the demo plan's SQL: any change to generated SQL shows up in review.

Regenerate with ``pytest tests/test_sql_golden.py --update-golden`` and read the diff.
"""

from __future__ import annotations

from pathlib import Path

import pytest
import sqlglot
from sqlglot import exp

from pipeline.engine.spark_rewrites import spark_plan
from pipeline.workflows.build import plan_study

from .conftest import DEMO_STUDY

GOLDEN = Path(__file__).parent / "golden" / "orvane_multimorbidity"
DESIGNS = Path(__file__).parent / "fixtures" / "designs"
DESIGN_STUDIES = sorted(p.relative_to(DESIGNS) for p in DESIGNS.glob("*/study*.yaml"))


@pytest.mark.parametrize("dialect", ["duckdb", "spark"])
def test_demo_plan_matches_golden(dialect: str, update_golden: bool) -> None:
    plan = plan_study(DEMO_STUDY)
    # Spark runs the plan after its rewrite rules; the golden shows exactly what it runs.
    text = (spark_plan(plan) if dialect == "spark" else plan).describe(dialect)
    golden = GOLDEN / f"{dialect}.sql"
    if update_golden:
        golden.write_text(text, encoding="utf-8")
    assert text == golden.read_text(encoding="utf-8")


@pytest.mark.parametrize("dialect", ["duckdb", "spark"])
@pytest.mark.parametrize("study", DESIGN_STUDIES, ids=str)
def test_design_plan_matches_golden(study: Path, dialect: str, update_golden: bool) -> None:
    # One golden file per design fixture's study file and dialect: tests/golden/designs/<fixture>/.
    plan = plan_study(DESIGNS / study)
    text = (spark_plan(plan) if dialect == "spark" else plan).describe(dialect)
    golden = GOLDEN.parent / "designs" / study.parent / f"{study.stem}.{dialect}.sql"
    if update_golden:
        golden.parent.mkdir(parents=True, exist_ok=True)
        golden.write_text(text, encoding="utf-8")
    assert text == golden.read_text(encoding="utf-8")


EXAMPLE_GOLDEN = ("orvane_new_users_matched",)
"""Example studies of definitions/studies/ with golden files in tests/golden/examples/."""


@pytest.mark.parametrize("dialect", ["duckdb", "spark"])
@pytest.mark.parametrize("name", EXAMPLE_GOLDEN)
def test_example_plan_matches_golden(name: str, dialect: str, update_golden: bool) -> None:
    study = Path(__file__).resolve().parents[1] / "definitions" / "studies" / f"{name}.yaml"
    plan = plan_study(study)
    text = (spark_plan(plan) if dialect == "spark" else plan).describe(dialect)
    golden = GOLDEN.parent / "examples" / f"{name}.{dialect}.sql"
    if update_golden:
        golden.parent.mkdir(parents=True, exist_ok=True)
        golden.write_text(text, encoding="utf-8")
    assert text == golden.read_text(encoding="utf-8")


def test_every_design_study_has_a_golden_file() -> None:
    assert len(DESIGN_STUDIES) >= 7
    written = sorted((GOLDEN.parent / "designs").glob("*/*.sql"))
    expected = sorted(
        GOLDEN.parent / "designs" / s.parent / f"{s.stem}.{d}.sql"
        for s in DESIGN_STUDIES
        for d in ("duckdb", "spark")
    )
    assert written == expected


def test_compiling_twice_gives_identical_plans() -> None:
    first, second = plan_study(DEMO_STUDY), plan_study(DEMO_STUDY)
    assert first.describe() == second.describe()
    assert first.content_hash() == second.content_hash()


def test_every_stage_parses_back_and_declares_what_it_reads() -> None:
    plan = plan_study(DEMO_STUDY)
    for stage in plan.stages:
        reparsed = sqlglot.parse_one(stage.render("duckdb"), read="duckdb")
        ctes = {cte.alias for cte in reparsed.find_all(exp.CTE)}
        tables = {t.name for t in reparsed.find_all(exp.Table) if t.name and t.name not in ctes}
        assert tables == set(stage.depends_on), stage.name


def test_stage_names_are_unique_snake_case() -> None:
    names = [s.name for s in plan_study(DEMO_STUDY).stages]
    assert len(names) == len(set(names))
    assert all(n.replace("_", "").isalnum() and n == n.lower() for n in names)
