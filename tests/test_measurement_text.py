"""``value_text`` is read only where ``value`` is missing, and parsed only there.

Some systems write every number twice, in ``value`` and ``value_text``; the judged stage must
not run its regular expressions on tens of millions of texts it will never read (issue 24).
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.workflows.build import plan_study

from .conftest import DEMO_STUDY


def _guarded(node: exp.Expression) -> bool:
    """Whether ``node`` sits in a CASE branch taken only when ``value_missing`` is true."""
    child, parent = node, node.parent
    while parent is not None:
        if isinstance(parent, exp.If) and child is parent.args.get("true"):
            condition = parent.this
            if isinstance(condition, exp.Column) and condition.name == "value_missing":
                return True
        child, parent = parent, parent.parent
    return False


def test_value_text_is_parsed_only_without_a_value() -> None:
    stage = next(s for s in plan_study(DEMO_STUDY).stages if s.name == "measurement_rows")
    parsing = [
        node
        for node in stage.query.find_all(exp.RegexpExtract, exp.RegexpLike)
        if any(c.name == "text_given" for c in node.find_all(exp.Column))
    ]
    # Qualifier, number and unit; what reads text_number after them gets NULL with a value.
    assert len(parsing) == 3
    unguarded = [node.sql("duckdb") for node in parsing if not _guarded(node)]
    assert unguarded == []
