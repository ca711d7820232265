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
    return _uncovered({p for pattern in patterns for p in expand_code(pattern)})


def _uncovered(prefixes: set[str]) -> list[str]:
    ordered = sorted(prefixes)
    return [p for p in ordered if not any(p != q and p.startswith(q) for q in ordered)]


def normalise_in(system: str, code: str) -> str:
    """Normalise a code as its system compares it.

    Read v2 is case-sensitive and pads codes with trailing dots (``G30..`` is ``G30``): only
    surrounding spaces and trailing dots go. Every other system: :func:`normalise_code`.

    >>> normalise_in("READ2", "H33z.")
    'H33z'
    """
    if system == "READ2":
        return code.strip().rstrip(".")
    return normalise_code(code)


def prefixes_in(system: str, patterns: tuple[str, ...]) -> list[str]:
    """:func:`expand_codes` for any system: Read v2 codes keep their case and have no ranges.

    >>> prefixes_in("READ2", ("G3...", "G30..", "H33z."))
    ['G3', 'H33z']
    """
    if system == "READ2":
        return _uncovered({normalise_in(system, p) for p in patterns})
    return expand_codes(patterns)


def read2_code_sql(column: exp.Expression) -> exp.Expression:
    """The SQL twin of :func:`normalise_in` for Read v2: trim spaces, then trailing dots.

    >>> read2_code_sql(exp.column("code")).sql()
    "RTRIM(TRIM(code), '.')"
    """
    return exp.Trim(
        this=exp.Trim(this=column), expression=exp.Literal.string("."), position="TRAILING"
    )
