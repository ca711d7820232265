"""Stage dependencies are read from the sqlglot trees, never written by hand.

The sweep shares stages between variants along these edges, so a dependency the query does not
have (or a read it does not list) would share a stage that differs.
"""

from __future__ import annotations

from pathlib import Path

import pytest
import sqlglot

from pipeline import plan_study
from pipeline.compile import Plan, SourceTable, Stage
from pipeline.compile._reads import relations_read

from .conftest import DEMO_STUDY

DESIGNS = Path(__file__).parent / "fixtures" / "designs"
STUDIES = [DEMO_STUDY, *sorted(DESIGNS.glob("*/study*.yaml"))]


def test_own_common_table_expressions_are_not_reads() -> None:
    query = sqlglot.parse_one(
        "WITH firsts AS (SELECT * FROM evidence_events) "
        "SELECT * FROM firsts JOIN src_patients USING (patient_id) "
        "WHERE patient_id IN (SELECT patient_id FROM index_dates)",
        read="duckdb",
    )
    assert relations_read(query) == ("evidence_events", "index_dates", "src_patients")


@pytest.mark.parametrize("study", STUDIES, ids=lambda p: p.parent.name + "/" + p.name)
def test_every_stage_declares_exactly_what_its_tree_reads(study: Path) -> None:
    plan = plan_study(study)
    for stage in plan.stages:
        assert set(stage.depends_on) == set(relations_read(stage.query)), stage.name


def test_a_stage_reads_what_its_tree_reads_and_a_plan_refuses_a_read_made_later() -> None:
    source = SourceTable("patients", ("patient_id",))
    first = Stage("first", sqlglot.parse_one("SELECT patient_id FROM src_patients"), "x")
    second = Stage("second", sqlglot.parse_one("SELECT patient_id FROM first"), "x")
    assert (first.depends_on, second.depends_on) == (("src_patients",), ("first",))
    Plan("s", (source,), (first, second), ())
    with pytest.raises(ValueError, match="before they exist"):
        Plan("s", (source,), (second, first), ())
