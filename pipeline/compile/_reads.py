"""What a stage reads, taken from its sqlglot tree rather than from what it declares.

The sweep shares a stage between two variants only when the stage and everything it reads,
transitively, compile to the same SQL; that needs the true edges of the plan. A declared list
can drift from the query it describes; the tree cannot.
"""

from __future__ import annotations

from sqlglot import exp


def relations_read(query: exp.Expression) -> tuple[str, ...]:
    """The relations (stages, ``src_<table>`` views) a query reads, sorted, without duplicates.

    Tables named in the query that are its own common table expressions (``WITH x AS ...``)
    are not reads of the plan: they live and die inside the query.

    Args:
        query: A stage's query tree.

    Returns:
        The names of the relations it reads, in alphabetical order.
    """
    own = {cte.alias for cte in query.find_all(exp.CTE)}
    return tuple(
        sorted({t.name for t in query.find_all(exp.Table) if t.name and t.name not in own})
    )
