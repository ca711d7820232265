"""Code lists as files: a CSV a clinician can review in a spreadsheet, and a header beside it.

A code list ``heart_failure_icd10.csv`` holds one code a row with its term (columns ``code``
and ``term``; an optional ``excluded`` column marks codes that must not count, ``yes`` or
empty; any other column is the user's and is kept as read). Its metadata are in the YAML file
beside it with the same stem, ``heart_failure_icd10.list.yaml``: the list's name, coding system
and edition, how codes match (``exact`` or ``prefix``), version, date, author, source and
licence note. Both files are read whole and checked at load time; every problem names the file
and line and carries a stable code (``code-shape``, ``duplicate-code``, ``included-and-excluded``,
``missing-key``, ``unknown-system``, ``unreadable``), so a command refuses the list before any
work.

:func:`load_code_list` is the library entry point; ``ascertain check`` and the definition
loader both use it.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Literal

from pydantic import Field

from pipeline.codes import (
    DIAGNOSIS_SYSTEMS,
    HierarchyError,
    check_code,
    descendants,
    normalise_in,
    read_hierarchy,
)
from pipeline.config._base import Model, Name
from pipeline.config._document import validate_document
from pipeline.config._yaml import LocatedDocument, load_yaml
from pipeline.errors import ConfigError, Problem

HEADER_SUFFIX = ".list.yaml"
LIST_SYSTEMS = (*DIAGNOSIS_SYSTEMS, "ATC")
ICD10_EDITIONS = ("WHO", "CM", "national")
_YES = ("yes", "y", "true", "1")
_NO = ("", "no", "n", "false", "0")


class CodeListHeader(Model):
    """The metadata of one code list (its ``.list.yaml`` file).

    Attributes:
        list: The list's name, ``[a-z][a-z0-9_]*``.
        title: What the codes identify, in words.
        system: The coding system (README.md lists the spellings).
        edition: Which edition of the system the codes are written in. For ICD-10 one of
            ``WHO``, ``CM`` or ``national``; for the others free text ("International
            Edition 2024-01").
        edition_codes: For a ``national`` ICD-10 edition: a CSV (column ``code``) of the
            edition's valid codes, supplied by the user because national modifications are
            licensed; ``ascertain check`` reports list codes not in it.
        match: ``prefix`` (a code counts every code that starts with it) or ``exact``.
        descendants_from: SNOMED CT only: a hierarchy (a ``parent,child`` CSV or a release
            relationship file) through which the list also counts every concept below its
            members.
        version: The list's own version, dotted numbers.
        date: The date of that version.
        author: The person role or organisation responsible for the list.
        source: The publication or repository it adapts, or "our own".
        licence: The licence note of the list and of the codes it reproduces.
    """

    list: Name
    title: str | None = None
    system: str
    edition: Annotated[str, Field(min_length=1)]
    edition_codes: str | None = None
    match: Literal["exact", "prefix"]
    descendants_from: str | None = None
    version: Annotated[str, Field(pattern=r"^[0-9]+(\.[0-9]+)*$")]
    date: dt.date
    author: Annotated[str, Field(min_length=1)]
    source: Annotated[str, Field(min_length=1)]
    licence: Annotated[str, Field(min_length=1)]


@dataclass(frozen=True)
class ListedCode:
    """One row of a code list's CSV.

    Attributes:
        code: The code as written (spaces around removed).
        term: Its term as written.
        excluded: The row marks a code that must not count.
        line: The row's line in the CSV (the header is line 1).
        extra: The user's own columns of that row, by column name, in file order.
    """

    code: str
    term: str
    excluded: bool
    line: int
    extra: tuple[tuple[str, str], ...] = ()


@dataclass(frozen=True)
class CodeList:
    """A loaded, checked code list.

    Attributes:
        file: The CSV.
        header_file: The ``.list.yaml`` beside it.
        header: Its metadata.
        codes: Its rows, in file order.
        widened: Concepts below the included members, through ``descendants_from`` (sorted;
            empty without a hierarchy).
        widened_excluded: Concepts below the excluded members, likewise.
    """

    file: Path
    header_file: Path
    header: CodeListHeader
    codes: tuple[ListedCode, ...]
    widened: tuple[str, ...] = ()
    widened_excluded: tuple[str, ...] = ()

    @property
    def name(self) -> str:
        """The list's name."""
        return self.header.list

    @property
    def system(self) -> str:
        """The coding system of every code in the list."""
        return self.header.system

    @property
    def edition(self) -> str:
        """The edition of the system the codes are written in."""
        return self.header.edition

    @property
    def match(self) -> str:
        """``prefix`` or ``exact``."""
        return self.header.match

    @property
    def terms(self) -> dict[str, str]:
        """Each written code's term."""
        return {c.code: c.term for c in self.codes}

    def included(self) -> tuple[str, ...]:
        """The codes that count, as written, then the widened ones."""
        return (*dict.fromkeys(c.code for c in self.codes if not c.excluded), *self.widened)

    def excluded(self) -> tuple[str, ...]:
        """The codes that must not count, as written, then the widened ones."""
        return (*dict.fromkeys(c.code for c in self.codes if c.excluded), *self.widened_excluded)

    @property
    def files(self) -> tuple[Path, ...]:
        """Every file the list was read from (for the manifest)."""
        extra = [self.header.descendants_from, self.header.edition_codes]
        return (
            self.file,
            self.header_file,
            *(self.header_file.parent / e for e in extra if e is not None),
        )


def header_file_of(csv_file: Path) -> Path:
    """The ``.list.yaml`` header beside a code list's CSV."""
    return csv_file.with_name(csv_file.name.removesuffix(".csv") + HEADER_SUFFIX)


def _read_header(file: Path) -> tuple[CodeListHeader, LocatedDocument]:
    doc = load_yaml(file)
    header = validate_document(doc, CodeListHeader)
    problems = []
    if header.system not in LIST_SYSTEMS:
        problems.append(
            doc.problem(
                ("system",),
                "unknown-system",
                f"unknown coding system '{header.system}'; known: {', '.join(LIST_SYSTEMS)}",
                at_value=True,
            )
        )
    elif header.system == "ICD10" and header.edition not in ICD10_EDITIONS:
        problems.append(
            doc.problem(
                ("edition",),
                "bad-value",
                f"an ICD-10 list's edition is one of {', '.join(ICD10_EDITIONS)} "
                f"(got '{header.edition}')",
                at_value=True,
            )
        )
    if (header.edition_codes is not None) != (
        header.system == "ICD10" and header.edition == "national"
    ):
        problems.append(
            doc.problem(
                ("edition",),
                "bad-value",
                "a national ICD-10 edition needs edition_codes (a table of its valid codes), "
                "and only it takes one",
            )
        )
    if header.system == "SNOMED" and header.match != "exact":
        problems.append(
            doc.problem(
                ("match",),
                "bad-value",
                "SNOMED CT identifiers hold no hierarchy in their digits: use match: exact, "
                "and descendants_from to count the concepts below the members",
                at_value=True,
            )
        )
    if header.descendants_from is not None and header.system != "SNOMED":
        problems.append(
            doc.problem(
                ("descendants_from",), "bad-value", "descendants_from is for SNOMED CT lists"
            )
        )
    if problems:
        raise ConfigError(problems)
    return header, doc


def _read_rows(file: Path) -> list[tuple[int, list[str]]]:
    try:
        text = file.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as err:
        raise ConfigError(
            [Problem(file, 0, 0, "unreadable", f"cannot read the code list: {err}")]
        ) from err
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    rows = []
    try:
        for row in reader:
            rows.append((reader.line_num, row))
    except csv.Error as err:
        raise ConfigError(
            [Problem(file, reader.line_num, 0, "unreadable", f"not valid CSV: {err}")]
        ) from err
    if not rows:
        raise ConfigError([Problem(file, 0, 0, "empty-file", "the code list is empty")])
    return rows


def _columns(file: Path, header: list[str]) -> list[str]:
    columns = [c.strip() for c in header]
    missing = [c for c in ("code", "term") if c not in columns]
    if missing:
        raise ConfigError(
            [
                Problem(
                    file,
                    1,
                    0,
                    "missing-key",
                    f"the header lacks column {' and '.join(missing)} (a code list needs code "
                    "and term; excluded is optional)",
                )
            ]
        )
    return columns


def _listed(file: Path, system: str, rows: list[tuple[int, list[str]]]) -> list[ListedCode]:
    columns = _columns(file, rows[0][1])
    problems: list[Problem] = []
    listed: list[ListedCode] = []
    for line, row in rows[1:]:
        if not any(field.strip() for field in row):
            continue  # a blank line a spreadsheet left
        if len(row) != len(columns):
            problems.append(
                Problem(
                    file, line, 0, "bad-row", f"expected {len(columns)} fields, found {len(row)}"
                )
            )
            continue
        values = dict(zip(columns, row, strict=True))
        code, term = values["code"].strip(), values["term"].strip()
        flag = values.get("excluded", "").strip().lower()
        if flag not in _YES + _NO:
            problems.append(
                Problem(file, line, 0, "bad-value", f"excluded is yes or empty, not '{flag}'")
            )
            continue
        try:
            if "-" in code and system not in ("READ2", "SNOMED"):
                raise ValueError(f"'{code}' is a range: a code list holds one code a row")
            check_code(system, code)
        except ValueError as err:
            problems.append(Problem(file, line, 0, "code-shape", str(err)))
            continue
        if not term:
            problems.append(Problem(file, line, 0, "missing-term", f"code '{code}' has no term"))
            continue
        extra = tuple((c, v) for c, v in values.items() if c not in ("code", "term", "excluded"))
        listed.append(ListedCode(code, term, flag in _YES, line, extra))
    problems += _conflicts(file, system, listed)
    if problems:
        raise ConfigError(problems)
    return listed


def _conflicts(file: Path, system: str, listed: list[ListedCode]) -> list[Problem]:
    """A code given twice with two terms, or both included and excluded."""
    first: dict[str, ListedCode] = {}
    problems = []
    for row in listed:
        key = normalise_in(system, row.code)
        earlier = first.setdefault(key, row)
        if earlier is row:
            continue
        if earlier.term != row.term:
            problems.append(
                Problem(
                    file,
                    row.line,
                    0,
                    "duplicate-code",
                    f"code '{row.code}' is listed again with another term ('{row.term}'; line "
                    f"{earlier.line} has '{earlier.term}')",
                )
            )
        if earlier.excluded != row.excluded:
            problems.append(
                Problem(
                    file,
                    row.line,
                    0,
                    "included-and-excluded",
                    f"code '{row.code}' is both included and excluded (see line {earlier.line})",
                )
            )
    return problems


def _widen(
    header: CodeListHeader, doc: LocatedDocument, listed: list[ListedCode]
) -> tuple[tuple[str, ...], tuple[str, ...]]:
    if header.descendants_from is None:
        return (), ()
    hierarchy = doc.file.parent / header.descendants_from
    try:
        children = read_hierarchy(hierarchy)
    except HierarchyError as err:
        raise ConfigError([Problem(hierarchy, err.line, 0, "unreadable", str(err))]) from err
    included = {c.code for c in listed if not c.excluded}
    excluded = {c.code for c in listed if c.excluded}
    below_excluded = descendants(excluded, children)
    below = descendants(included, children) - included - excluded - below_excluded
    return tuple(sorted(below)), tuple(sorted(below_excluded - excluded))


def load_code_list(path: Path) -> CodeList:
    """Read and check a code list: its CSV and the ``.list.yaml`` header beside it.

    Args:
        path: The CSV, or its header file.

    Raises:
        ConfigError: Every problem found, each with its file, line and stable code.
    """
    csv_file = (
        path.with_name(path.name.removesuffix(HEADER_SUFFIX) + ".csv")
        if path.name.endswith(HEADER_SUFFIX)
        else path
    )
    header_file = header_file_of(csv_file)
    header, doc = _read_header(header_file)
    listed = _listed(csv_file, header.system, _read_rows(csv_file))
    widened, widened_excluded = _widen(header, doc, listed)
    return CodeList(csv_file, header_file, header, tuple(listed), widened, widened_excluded)
