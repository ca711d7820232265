"""Code normalisation and the expansion of code lists into prefixes.

Codes are compared after the same normalisation on both sides: upper case, dots and spaces
removed. A definition's code is a prefix; ``I10-I15`` is a range of prefixes of equal length.
The compiler joins extract rows to the resulting prefix table by equality, never row by row.
"""

from __future__ import annotations

import itertools
import string

from sqlglot import exp

MAX_RANGE_SIZE = 5000


def normalise_code(code: str) -> str:
    """Normalise a code the way the engine does.

    >>> normalise_code(" e11.9 ")
    'E119'
    """
    return code.upper().replace(".", "").replace(" ", "")


def normalised_code_sql(column: exp.Expression) -> exp.Expression:
    """The SQL twin of :func:`normalise_code`, applied on the engine.

    >>> normalised_code_sql(exp.column("code")).sql()
    "REPLACE(REPLACE(UPPER(code), '.', ''), ' ', '')"
    """
    upper = exp.Upper(this=column)
    no_dots = exp.func("REPLACE", upper, exp.Literal.string("."), exp.Literal.string(""))
    return exp.func("REPLACE", no_dots, exp.Literal.string(" "), exp.Literal.string(""))


def _position_alphabet(low: str, high: str) -> str:
    if low.isdigit() and high.isdigit():
        return string.digits
    if low.isalpha() and high.isalpha():
        return string.ascii_uppercase
    return string.digits + string.ascii_uppercase


def expand_code(pattern: str) -> list[str]:
    """Expand one written code into normalised prefixes.

    A plain code is one prefix. A range ``LOW-HIGH`` (both of the same normalised length) is
    every code of that length between them, each position drawn from digits or letters as the
    two ends show.

    >>> expand_code("I10-I13")
    ['I10', 'I11', 'I12', 'I13']
    >>> expand_code("250.0")
    ['2500']

    Raises:
        ValueError: An empty, reversed or unequal-length range, or one too large to expand.
    """
    if "-" not in pattern:
        code = normalise_code(pattern)
        if not code:
            raise ValueError(f"'{pattern}' is empty after normalisation")
        return [code]
    low, high = (normalise_code(part) for part in pattern.split("-", 1))
    if not low or not high:
        raise ValueError(f"range '{pattern}' has an empty end")
    if len(low) != len(high):
        raise ValueError(f"range '{pattern}': both ends must have the same length")
    if low > high:
        raise ValueError(f"range '{pattern}' is reversed: {low} comes after {high}")
    alphabets = [_position_alphabet(a, b) for a, b in zip(low, high, strict=True)]
    size = 1
    for alphabet in alphabets:
        size *= len(alphabet)
    if size > MAX_RANGE_SIZE * 100:
        raise ValueError(f"range '{pattern}' is too wide to expand")
    expanded = [
        "".join(chars) for chars in itertools.product(*alphabets) if low <= "".join(chars) <= high
    ]
    if len(expanded) > MAX_RANGE_SIZE:
        raise ValueError(
            f"range '{pattern}' expands to {len(expanded)} codes (limit {MAX_RANGE_SIZE})"
        )
    return expanded


def expand_codes(patterns: tuple[str, ...]) -> list[str]:
    """Expand a code list into sorted, distinct prefixes, dropping those another one covers."""
    prefixes = sorted({p for pattern in patterns for p in expand_code(pattern)})
    return [p for p in prefixes if not any(p != q and p.startswith(q) for q in prefixes)]
