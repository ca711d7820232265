"""Spark SQL from DuckDB-dialect stage trees: the differences, fixed in one place.

The stages are sqlglot trees written for DuckDB. Rendering them with ``dialect="spark"`` is
not enough: a handful of functions mean something else on Spark (or do not exist), and those
differences are fixed here by :data:`REWRITES` -- small pure rules applied, in order, to a copy
of each tree before rendering (see :func:`spark_query`). Everything else (null ordering,
``DATE_DIFF`` argument order, ``x + INTERVAL n DAY`` returning a date, ``REGEXP_EXTRACT``'s
default group, ``CONCAT`` skipping NULLs, ``BOOL_OR``, ``LEAST``/``GREATEST`` skipping NULLs,
``VALUES ... AS t(a, b)``) sqlglot's Spark dialect already translates, or means the same.

One known difference no SQL rule fixes: Spark's ``ROUND(double, d)`` rounds the shortest
decimal text of the double (``Double.toString``) half up, where DuckDB rounds its exact binary
value, so they differ at apparent ties (0.0055 -> 0.006 on Spark, 0.005 on DuckDB), and Java's
``POW`` may differ from C's by one ulp. The plans round no double to decimal places in SQL (the
build rounds them once in Python when it writes them), and the Spark tests compare doubles to 1e-9.

No pyspark here: the golden Spark SQL is rendered from these rules without it.
"""

from __future__ import annotations

import dataclasses
import re
from collections.abc import Callable

from sqlglot import exp

from pipeline.compile import Plan
from pipeline.engine.base import try_cast

Rule = Callable[[exp.Expression], exp.Expression]

# -- the rewrite rules -------------------------------------------------------------------------

_INTEGER_TYPES = (
    exp.DataType.Type.TINYINT,
    exp.DataType.Type.SMALLINT,
    exp.DataType.Type.INT,
    exp.DataType.Type.BIGINT,
)
_DOUBLE_TYPES = (exp.DataType.Type.DOUBLE, exp.DataType.Type.FLOAT)

# DuckDB's date grammar for a cast from text: year, month and day separated by one repeated
# '-', '/' or ' ', then optionally a time of day ('T' or a space, hh:mm[:ss[.fff]], an offset).
# Spark also takes '2019', '2019-01', '+2019-01-01' and '2019-01-01 BC', which DuckDB refuses.
_DUCKDB_DATE = (
    r"^\s*(-?[0-9]{1,7})([-/ ])([0-9]{1,2})\2([0-9]{1,2})"
    r"([ T][0-9]{1,2}:[0-9]{2}(:[0-9]{2}(\.[0-9]+)?)?\s*([+-][0-9]{2}(:?[0-9]{2})?|Z|UTC)?)?\s*$"
)
# Java (and so Spark) reads a trailing d/f/D/F as a type suffix: '5d' is 5.0; DuckDB refuses it.
_JAVA_FLOAT_SUFFIX = r"[0-9.][dDfF]\s*$"

_STRFTIME_TO_JAVA = {
    "%Y": "yyyy",
    "%y": "yy",
    "%m": "M",
    "%d": "d",
    "%H": "H",
    "%M": "m",
    "%S": "s",
    "%b": "MMM",
    "%B": "MMMM",
    "%%": "%",
}


def _text(node: exp.Expression) -> exp.Expression:
    return exp.cast(node.copy(), exp.DataType.Type.TEXT)


def _rlike(node: exp.Expression, pattern: str) -> exp.Expression:
    return exp.RegexpLike(this=_text(node), expression=exp.Literal.string(pattern))


_DONE = "spark_rewritten"


def _done(node: exp.Expression) -> exp.Expression:
    """Mark a node a rule produced, so that no rule rewrites it again."""
    node.meta[_DONE] = True
    return node


def _is_done(node: exp.Expression) -> bool:
    return bool(node.meta.get(_DONE))


def safe_try_cast(node: exp.Expression) -> exp.Expression:
    """TRY_CAST stays TRY_CAST.

    sqlglot renders a ``TryCast`` built without ``safe=True`` as a plain ``CAST`` for Spark; with
    ANSI mode on that fails on the first bad value where DuckDB returns NULL.
    """
    if isinstance(node, exp.TryCast) and not node.args.get("safe"):
        node.set("safe", value=True)
    return node


def duckdb_text_to_date(node: exp.Expression) -> exp.Expression:
    """``TRY_CAST(text AS DATE)`` accepts what DuckDB accepts, no more and no less.

    Spark reads '2019' and '2019-01' as 1 January and ignores a trailing 'BC'; DuckDB returns
    NULL for those (they become "unparseable date" in the quality log). DuckDB also takes '/'
    and ' ' as separators, which Spark does not, so the text is rewritten to ISO first.
    """
    if not (
        isinstance(node, exp.TryCast)
        and node.to.is_type(exp.DataType.Type.DATE)
        and not isinstance(node.this, exp.Literal)
        and not _is_done(node)
    ):
        return node
    iso = exp.func(
        "REGEXP_REPLACE",
        exp.Trim(this=_text(node.this)),
        exp.Literal.string(_DUCKDB_DATE),
        exp.Literal.string("$1-$3-$4"),
    )
    cast = _done(try_cast(iso, exp.DataType.build("DATE")))
    return exp.Case().when(_rlike(node.this, _DUCKDB_DATE), cast)


def duckdb_text_to_number(node: exp.Expression) -> exp.Expression:
    """``TRY_CAST(text AS INT/DOUBLE)`` follows DuckDB.

    DuckDB rounds a decimal or exponent text to the nearest integer ('1950.0' and '1.95e3' are
    1950, '2.5' is 3); Spark returns NULL. Java reads '5d' as 5.0; DuckDB returns NULL.
    """
    if not isinstance(node, exp.TryCast) or isinstance(node.this, exp.Literal) or _is_done(node):
        return node
    if node.to.is_type(*_INTEGER_TYPES):
        exact = _done(try_cast(node.this.copy(), node.to))
        double = duckdb_text_to_number(try_cast(node.this.copy(), exp.DataType.build("DOUBLE")))
        rounded = _done(try_cast(exp.func("ROUND", double), node.to))
        return exp.func("COALESCE", exact, rounded)
    if node.to.is_type(*_DOUBLE_TYPES):
        cast = _done(try_cast(node.this.copy(), node.to))
        return exp.Case().when(exp.not_(_rlike(node.this, _JAVA_FLOAT_SUFFIX)), cast)
    return node


def regexp_functions(node: exp.Expression) -> exp.Expression:
    """DuckDB's ``REGEXP_MATCHES(s, p)`` (a match anywhere) is Spark's ``s RLIKE p``.

    ``REGEXP_FULL_MATCH(s, p)`` is ``s RLIKE '^(?:p)$'``. Both use RE2 / Java syntax, which
    agree on the classes, groups and quantifiers the plans use.
    """
    full_match = getattr(exp, "RegexpFullMatch", None)
    if full_match is not None and isinstance(node, full_match):
        name, args = "REGEXP_FULL_MATCH", [node.this, node.expression]
    elif isinstance(node, exp.Anonymous) and len(node.expressions) == 2:
        name, args = str(node.this).upper(), list(node.expressions)
    else:
        return node
    subject, pattern = args
    if name == "REGEXP_MATCHES":
        return exp.RegexpLike(this=subject.copy(), expression=pattern.copy())
    if name == "REGEXP_FULL_MATCH" and isinstance(pattern, exp.Literal):
        anchored = exp.Literal.string(f"^(?:{pattern.name})$")
        return exp.RegexpLike(this=subject.copy(), expression=anchored)
    return node


def _java_format(strftime: str) -> str:
    parts = re.split(r"(%.)", strftime)
    out: list[str] = []
    for i, part in enumerate(parts):
        if part in _STRFTIME_TO_JAVA:
            java = _STRFTIME_TO_JAVA[part]
            # A variable-width field directly followed by another field must be fixed width.
            following = next((p for p in parts[i + 1 :] if p), "")
            if java in ("M", "d", "H", "m", "s") and following.startswith("%"):
                java *= 2
            out.append(java)
        elif part:
            out.append("'" + part.replace("'", "''") + "'" if part.strip(" -/.:,") else part)
    return "".join(out)


def try_strptime(node: exp.Expression) -> exp.Expression:
    """DuckDB's ``TRY_STRPTIME(text, '%d/%m/%Y')`` is ``TRY_TO_TIMESTAMP(text, 'd/M/yyyy')``."""
    if not (isinstance(node, exp.Anonymous) and str(node.this).upper() == "TRY_STRPTIME"):
        return node
    text, fmt = node.expressions
    if not isinstance(fmt, exp.Literal):
        return node
    java = exp.Literal.string(_java_format(fmt.name))
    return exp.Anonymous(this="TRY_TO_TIMESTAMP", expressions=[text.copy(), java])


def ieee_division(node: exp.Expression) -> exp.Expression:
    """``a / 0`` is +-inf or NaN as on DuckDB, not an error (ANSI) or NULL (non-ANSI Spark).

    Division by a non-zero number literal is left alone.
    """
    if not isinstance(node, exp.Div) or _is_done(node):
        return node
    divisor = node.expression
    if isinstance(divisor, exp.Literal) and divisor.is_number and float(divisor.name) != 0:
        return node
    inf = exp.cast(exp.Literal.string("Infinity"), exp.DataType.Type.DOUBLE)
    kept = _done(node.copy())
    zero = exp.EQ(this=divisor.copy(), expression=exp.Literal.number(0))
    return exp.Case().when(zero, exp.Mul(this=node.this.copy(), expression=inf)).else_(kept)


def make_date_in_range(node: exp.Expression) -> exp.Expression:
    """``MAKE_DATE(y, m, d)`` is NULL outside years 1-9999 instead of failing the run.

    DuckDB builds dates outside that range (year 0, 12019); Spark with ANSI mode fails the
    whole stage. This is a declared difference: such years give no birth date on Spark.
    """
    if not isinstance(node, exp.DateFromParts) or _is_done(node):
        return node
    kept = _done(node.copy())
    year = node.args["year"].copy()
    in_range = exp.Between(this=year, low=exp.Literal.number(1), high=exp.Literal.number(9999))
    return exp.Case().when(in_range, kept)


REWRITES: tuple[Rule, ...] = (
    safe_try_cast,
    regexp_functions,
    try_strptime,
    duckdb_text_to_date,
    duckdb_text_to_number,
    ieee_division,
    make_date_in_range,
)
"""The rules, in order; each is applied to the whole tree before the next."""


def spark_query(query: exp.Query) -> exp.Query:
    """A copy of a stage's query with every rule of :data:`REWRITES` applied.

    >>> from sqlglot import parse_one
    >>> q = parse_one("SELECT REGEXP_MATCHES(code, '^E11') AS dm FROM t", read="duckdb")
    >>> spark_query(q).sql("spark")
    "SELECT code RLIKE '^E11' AS dm FROM t"
    """
    tree: exp.Expression = query.copy()
    for rule in REWRITES:
        tree = _bottom_up(tree, rule)
    assert isinstance(tree, exp.Query)
    return tree


def _bottom_up(node: exp.Expression, rule: Rule) -> exp.Expression:
    """Apply ``rule`` to every node, children first; what a rule returns is not revisited."""
    for child in list(node.iter_expressions()):
        new = _bottom_up(child, rule)
        if new is not child:
            child.replace(new)
    return rule(node)


def spark_plan(plan: Plan) -> Plan:
    """The plan with every stage rewritten for Spark.

    ``spark_plan(plan).describe("spark")`` is exactly the SQL
    :class:`~pipeline.engine.spark.SparkEngine` runs.
    """
    stages = tuple(dataclasses.replace(s, query=spark_query(s.query)) for s in plan.stages)
    return dataclasses.replace(plan, stages=stages)
