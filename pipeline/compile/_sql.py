"""Small builders for SQL trees: parsed templates with placeholders, dates, day arithmetic.

Templates are constant strings written by us; every value that comes from a definition or a
study enters the tree through a placeholder as a sqlglot literal, never as pasted text.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable
from functools import lru_cache
from typing import Any

import sqlglot
from sqlglot import exp

from pipeline.compile._plan import SOURCE_DIALECT


@lru_cache(maxsize=256)
def _parse(text: str) -> exp.Expression:
    return sqlglot.parse_one(text, dialect=SOURCE_DIALECT)


def value(item: Any) -> exp.Expression:
    """Turn a Python value into a SQL literal expression (dates become typed date literals).

    >>> value(dt.date(2019, 12, 31)).sql()
    "CAST('2019-12-31' AS DATE)"
    """
    if isinstance(item, exp.Expression):
        return item
    if isinstance(item, dt.date):
        return exp.cast(exp.Literal.string(item.isoformat()), exp.DataType.Type.DATE)
    if isinstance(item, bool) or item is None or isinstance(item, str | int | float):
        return exp.convert(item)
    raise TypeError(f"no SQL literal for {type(item).__name__}")


def template(text: str, **values: Any) -> exp.Expression:
    """Parse a constant SQL template and fill its ``:name`` placeholders with literals.

    >>> template("SELECT * FROM t WHERE d <= :end", end=dt.date(2019, 12, 31)).sql()
    "SELECT * FROM t WHERE d <= CAST('2019-12-31' AS DATE)"

    Raises:
        ValueError: A placeholder has no value, or a value has no placeholder.
    """
    tree = _parse(text)
    names = {p.name for p in tree.find_all(exp.Placeholder)}
    if names != set(values):
        raise ValueError(f"template placeholders {sorted(names)} != values {sorted(values)}")
    literals = {k: value(v) for k, v in values.items()}
    return tree.transform(
        lambda node: literals[node.name].copy() if isinstance(node, exp.Placeholder) else node
    )


def query(text: str, **values: Any) -> exp.Query:
    """Like :func:`template`, for a whole query."""
    tree = template(text, **values)
    if not isinstance(tree, exp.Query):
        raise TypeError("the template is not a query")
    return tree


def days_between(start: exp.Expression, end: exp.Expression) -> exp.Expression:
    """Whole days from ``start`` to ``end`` (``end - start``), as an integer."""
    return exp.DateDiff(this=end, expression=start, unit=exp.var("DAY"))


def in_window(window: tuple[int | None, int], offset: exp.Expression) -> exp.Expression:
    """``offset`` inside the window (both ends included; no start means all history)."""
    start, end = window
    if start is None:
        return offset <= end
    return offset.between(start, end)


def near_index(
    day: exp.Expression, possible: tuple[dt.date, dt.date], window: tuple[int | None, int]
) -> exp.Expression:
    """``day`` inside ``window`` of some index date in ``possible`` (first, last), by fixed dates.

    True of every row a window can reach from a patient's own index date, so an engine can drop
    the other rows before any join to the index dates.
    """
    first, last = possible
    start, end = window
    latest = value(last + dt.timedelta(days=end))
    if start is None:
        return day <= latest
    return day.between(value(first + dt.timedelta(days=start)), latest)


def add_days(date: exp.Expression, days: int | exp.Expression) -> exp.Expression:
    """``date + days`` as a DATE on every engine."""
    return exp.cast(
        exp.DateAdd(this=date, expression=value(days), unit=exp.var("DAY")), exp.DataType.Type.DATE
    )


def is_in(column: exp.Expression, items: Iterable[str]) -> exp.Expression:
    """``column IN (...)`` with each item as a literal, in sorted order for stable SQL."""
    return column.isin(*(exp.convert(i) for i in sorted(set(items))))


def values_table(alias: str, columns: list[str], rows: list[tuple[Any, ...]]) -> exp.Expression:
    """A literal table ``(VALUES ...) AS alias(columns)`` built from Python rows.

    >>> values_table("t", ["a"], [(1,), (2,)]).sql()
    '(VALUES (1), (2)) AS t(a)'
    """
    return exp.values([tuple(value(v) for v in row) for row in rows], alias=alias, columns=columns)


def expression(text: str, **values: Any) -> exp.Expression:
    """Like :func:`template`, for a single expression.

    >>> expression("a + :n", n=1).sql()
    'a + 1'
    """
    return query("SELECT " + text, **values).selects[0]


def age_in_years(*, birth: exp.Expression, on: exp.Expression) -> exp.Expression:
    """Age in completed years on ``on`` for a person born on ``birth``.

    A person born on 29 February turns a year older on 1 March in non-leap years.
    """
    return expression(
        "YEAR(:at) - YEAR(:born)"
        " - CASE WHEN MONTH(:at) * 100 + DAY(:at) < MONTH(:born) * 100 + DAY(:born)"
        " THEN 1 ELSE 0 END",
        at=on,
        born=birth,
    )
