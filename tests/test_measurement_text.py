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
    stage = next(s for s in plan_study(DEMO_STUDY).stages if s.name == "measurement_shapes")
    parsing = [
        node
        for node in stage.query.find_all(exp.RegexpExtract, exp.RegexpLike)
        if any(c.name == "text_given" for c in node.find_all(exp.Column))
    ]
    # Qualifier, number and unit; what reads text_number after them gets NULL with a value.
    assert len(parsing) == 3
    unguarded = [node.sql("duckdb") for node in parsing if not _guarded(node)]
    assert unguarded == []


def test_rows_meet_their_judged_shape_without_parsing_anything() -> None:
    """Parsing, units and plausibility are judged per distinct shape, not per row (issue 24).

    ``measurement_rows`` reads millions of rows; it may only join them to
    ``measurement_shapes`` and judge what depends on the row (patient, date).
    """
    plan = plan_study(DEMO_STUDY)
    rows = plan.stage("measurement_rows")
    assert "measurement_shapes" in rows.depends_on
    assert not list(rows.query.find_all(exp.RegexpExtract, exp.RegexpLike))
    casts = [c for c in rows.query.find_all(exp.TryCast, exp.Cast) if c.to.is_type("double")]
    assert casts == []
    shapes = plan.stage("measurement_shapes").query
    assert shapes.find(exp.Distinct) is not None
    # Every raw column is a join key, compared so that NULLs meet NULLs (a number's
    # value_text is NULL in most extracts).
    keys = {c.name for eq in rows.query.find_all(exp.NullSafeEQ) for c in eq.find_all(exp.Column)}
    assert {"measure", "unit", "value", "value_text"} <= keys
