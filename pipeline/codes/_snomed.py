"""SNOMED CT concept identifiers: the Verhoeff check digit, the partition, and is-a hierarchies.

A SNOMED CT identifier (SCTID) is 6 to 18 digits: an item identifier (with a namespace in the
long format), a two-digit partition identifier, and a Verhoeff check digit (SNOMED CT Technical
Implementation Guide, "SCTID data type"; from memory). The partition's first digit is 0 for the
short format, 1 for the long (namespace) format; its second digit says what is identified:
0 a concept, 1 a description, 2 a relationship. A code list holds concepts, so only partitions
``00`` and ``10`` are accepted.

The Verhoeff algorithm (J. Verhoeff, *Error detecting decimal codes*, 1969) uses the dihedral
group D5: the multiplication table ``_D``, the permutation table ``_P`` (row ``i`` is the
permutation applied to the digit ``i`` places from the right, repeating every 8) and the
inverse ``_INV``. The tables are the published ones (as on the algorithm's Wikipedia page;
written from memory and checked against its worked examples in ``tests/test_coding_systems.py``).

SNOMED CT codes carry no hierarchy in their digits, so a list is widened to the concepts below
its members through a hierarchy the user supplies (:func:`read_hierarchy`).
"""

from __future__ import annotations

import csv
from collections.abc import Iterable
from pathlib import Path

# fmt: off
_D = (
    (0, 1, 2, 3, 4, 5, 6, 7, 8, 9), (1, 2, 3, 4, 0, 6, 7, 8, 9, 5),
    (2, 3, 4, 0, 1, 7, 8, 9, 5, 6), (3, 4, 0, 1, 2, 8, 9, 5, 6, 7),
    (4, 0, 1, 2, 3, 9, 5, 6, 7, 8), (5, 9, 8, 7, 6, 0, 4, 3, 2, 1),
    (6, 5, 9, 8, 7, 1, 0, 4, 3, 2), (7, 6, 5, 9, 8, 2, 1, 0, 4, 3),
    (8, 7, 6, 5, 9, 3, 2, 1, 0, 4), (9, 8, 7, 6, 5, 4, 3, 2, 1, 0),
)
_P = (
    (0, 1, 2, 3, 4, 5, 6, 7, 8, 9), (1, 5, 7, 6, 2, 8, 3, 0, 9, 4),
    (5, 8, 0, 3, 7, 9, 6, 1, 4, 2), (8, 9, 1, 6, 0, 4, 3, 5, 2, 7),
    (9, 4, 5, 3, 1, 2, 6, 8, 7, 0), (4, 2, 8, 6, 5, 7, 3, 9, 0, 1),
    (2, 7, 9, 3, 8, 0, 6, 4, 1, 5), (7, 0, 4, 6, 9, 1, 3, 2, 5, 8),
)
_INV = (0, 4, 3, 2, 1, 5, 6, 7, 8, 9)
# fmt: on

CONCEPT_PARTITIONS = ("00", "10")
IS_A = "116680003"  # the is-a relationship type's concept identifier (from memory)


def verhoeff_check_digit(digits: str) -> int:
    """The Verhoeff check digit to append to a string of digits.

    >>> verhoeff_check_digit("236")
    3
    """
    check = 0
    for i, char in enumerate(reversed(digits)):
        check = _D[check][_P[(i + 1) % 8][int(char)]]
    return _INV[check]


def verhoeff_valid(number: str) -> bool:
    """Whether a string of digits ends in its correct Verhoeff check digit."""
    check = 0
    for i, char in enumerate(reversed(number)):
        check = _D[check][_P[i % 8][int(char)]]
    return check == 0


def snomed_problem(code: str) -> str | None:
    """What is wrong with a concept identifier of the right length and digits, or None.

    >>> snomed_problem("73211009") is None
    True
    >>> snomed_problem("73211008")
    'a concept identifier whose last digit is its Verhoeff check digit (73211008 fails the check)'
    """
    if not verhoeff_valid(code):
        return (
            "a concept identifier whose last digit is its Verhoeff check digit "
            f"({code} fails the check)"
        )
    partition = code[-3:-1]
    if partition not in CONCEPT_PARTITIONS:
        return (
            f"a concept identifier, partition 00 or 10 ({code} has partition {partition}, "
            "which identifies a description or relationship)"
        )
    return None


class HierarchyError(ValueError):
    """A hierarchy file that cannot be read, with the line at fault (0: the whole file)."""

    def __init__(self, line: int, message: str) -> None:
        self.line = line
        super().__init__(message)


def read_hierarchy(file: Path) -> dict[str, set[str]]:
    """Children by parent, from a parent/child table or a release relationship file.

    Two layouts are read, told apart by the header: a CSV with columns ``parent`` and
    ``child``; or the terminology release's tab-separated relationship file (columns ``id``,
    ``effectiveTime``, ``active``, ``moduleId``, ``sourceId``, ``destinationId``,
    ``relationshipGroup``, ``typeId``, ...), of which only active is-a rows count (the source
    is the child, the destination the parent). A snapshot release holds each relationship once;
    a full release's history is not resolved here (use a snapshot).

    Raises:
        HierarchyError: The file cannot be read, or lacks the columns of either layout.
    """
    try:
        text = file.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as err:
        raise HierarchyError(0, f"cannot read the hierarchy file: {err}") from err
    lines = text.splitlines()
    if not lines:
        raise HierarchyError(0, "the hierarchy file is empty")
    header = lines[0].split("\t")
    if {"sourceId", "destinationId", "typeId", "active"} <= set(header):
        return _children(_release_pairs(header, lines[1:]))
    rows = csv.reader(lines)
    columns = [c.strip() for c in next(rows)]
    if not {"parent", "child"} <= set(columns):
        raise HierarchyError(
            1,
            "a hierarchy needs a header with parent and child (a CSV table), or a release "
            "relationship file with sourceId, destinationId, typeId and active",
        )
    parent, child = columns.index("parent"), columns.index("child")
    pairs = []
    for line, row in enumerate(rows, start=2):
        if len(row) != len(columns):
            raise HierarchyError(line, f"expected {len(columns)} fields, found {len(row)}")
        pairs.append((row[parent].strip(), row[child].strip()))
    return _children(pairs)


def _release_pairs(header: list[str], lines: list[str]) -> list[tuple[str, str]]:
    index = {name: i for i, name in enumerate(header)}
    pairs = []
    for line, text in enumerate(lines, start=2):
        fields = text.split("\t")
        if len(fields) != len(header):
            raise HierarchyError(line, f"expected {len(header)} tab-separated fields")
        if fields[index["active"]] == "1" and fields[index["typeId"]] == IS_A:
            pairs.append((fields[index["destinationId"]], fields[index["sourceId"]]))
    return pairs


def _children(pairs: Iterable[tuple[str, str]]) -> dict[str, set[str]]:
    children: dict[str, set[str]] = {}
    for parent, child in pairs:
        children.setdefault(parent, set()).add(child)
    return children


def descendants(codes: Iterable[str], children: dict[str, set[str]]) -> set[str]:
    """Every concept below the given ones (not themselves), following is-a links; cycle-safe.

    >>> sorted(descendants(["1"], {"1": {"2"}, "2": {"3"}, "3": {"1"}}))
    ['2', '3']
    """
    start = set(codes)
    found: set[str] = set()
    pending = list(start)
    while pending:
        for child in children.get(pending.pop(), ()):
            if child not in found:
                found.add(child)
                pending.append(child)
    return found - start
