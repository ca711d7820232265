"""The attrition log: patients in the extract, without an index date, and at each step.

Every eligibility step is one boolean column of ``eligibility``; the log counts patients who
pass all steps before it and fail it, so each removed patient is counted exactly once, in order.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._sql import value
from pipeline.compile.names import step_column


def attrition_query(steps: list[tuple[str, str]], *, index_text: str) -> exp.Query:
    # The whole extract first: patients without an index date are the first removed.
    extract = exp.select(exp.func("COUNT", exp.Star())).from_(names.PATIENT_BASE)
    counts = [exp.func("COUNT", exp.Star()).as_("n_0"), extract.subquery().as_("n_all")]
    condition: exp.Expression = exp.column("step_1")
    for i in range(1, len(steps) + 1):
        if i > 1:
            condition = exp.and_(condition, exp.column(step_column(i)))
        passed = exp.Case().when(condition.copy(), exp.Literal.number(1))
        counts.append(
            exp.func(
                "COALESCE",
                exp.Sum(this=passed.else_(exp.Literal.number(0))),
                exp.Literal.number(0),
            ).as_(f"n_{i}")
        )
    totals = exp.select(*counts).from_(names.ELIGIBILITY)
    rows = [
        exp.select(
            exp.Literal.number(-2).as_("step_number"),
            value("patients_in_extract").as_("step"),
            value("patients in the extract").as_("description"),
            exp.column("n_all").as_("patients_before"),
            exp.Literal.number(0).as_("removed"),
            exp.column("n_all").as_("remaining"),
        ).from_("totals"),
        exp.select(
            exp.Literal.number(-1),
            value("without_index_date"),
            value("without an index date"),
            exp.column("n_all"),
            exp.column("n_all") - exp.column("n_0"),
            exp.column("n_0"),
        ).from_("totals"),
        exp.select(
            exp.Literal.number(0),
            value("source_population"),
            value(index_text),
            exp.column("n_0"),
            exp.Literal.number(0),
            exp.column("n_0"),
        ).from_("totals"),
    ]
    for i, (name, text) in enumerate(steps, start=1):
        rows.append(
            exp.select(
                exp.Literal.number(i),
                value(name),
                value(text),
                exp.column(f"n_{i - 1}"),
                exp.column(f"n_{i - 1}") - exp.column(f"n_{i}"),
                exp.column(f"n_{i}"),
            ).from_("totals")
        )
    union = rows[0]
    for row in rows[1:]:
        union = union.union(row, distinct=False)
    typed = exp.select(
        exp.cast(exp.column("step_number"), "INT").as_("step_number"),
        "step",
        "description",
        exp.cast(exp.column("patients_before"), "BIGINT").as_("patients_before"),
        exp.cast(exp.column("removed"), "BIGINT").as_("removed"),
        exp.cast(exp.column("remaining"), "BIGINT").as_("remaining"),
    ).from_(union.subquery("steps"))
    return typed.with_("totals", as_=totals)
