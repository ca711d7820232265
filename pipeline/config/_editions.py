"""``ascertain check``'s edition check: each ICD-10 list code must exist in the list's edition.

Loading a list checks each code's shape only; whether ``N18.6`` exists depends on the edition
(ICD-10-CM has it, WHO ICD-10 does not). The check reads the edition's codes
(:mod:`pipeline.codes._editions`) once per command and reports each code of a list that the
edition does not have, at the list's line, with the stable code ``not-in-edition``. It runs in
``check`` only: a build matches codes as written and does not read the reference packages.
"""

from __future__ import annotations

from collections.abc import Iterable
from pathlib import Path

from pipeline.codes._editions import (
    EditionCodes,
    EditionTableError,
    library_edition,
    read_edition_table,
)
from pipeline.config._codelist import CodeList
from pipeline.config._yaml import load_yaml
from pipeline.errors import Problem


class _Editions:
    """The editions read so far in one check, so each is read once."""

    def __init__(self) -> None:
        self._read: dict[str | Path, EditionCodes | list[Problem]] = {}

    def of(self, code_list: CodeList) -> EditionCodes | list[Problem]:
        header = code_list.header
        if header.edition_codes is None:
            key: str | Path = header.edition
            if key not in self._read:
                self._read[key] = library_edition(header.edition)
            return self._read[key]
        table = (code_list.header_file.parent / header.edition_codes).resolve()
        if table not in self._read:
            try:
                self._read[table] = read_edition_table(table)
            except EditionTableError as err:
                self._read[table] = _table_problems(code_list, table, err)
        return self._read[table]


def _table_problems(code_list: CodeList, table: Path, err: EditionTableError) -> list[Problem]:
    """A table problem at its line, or where the header names the table when it has none."""
    problems = []
    for line, message in err.lines:
        if line:
            problems.append(Problem(table, line, 0, "bad-row", message))
        else:
            doc = load_yaml(code_list.header_file)
            problems.append(
                doc.problem(
                    ("edition_codes",),
                    "unreadable",
                    f"{message} ({table.name})",
                    at_value=True,
                )
            )
    return problems


def edition_problems(code_lists: Iterable[CodeList]) -> list[Problem]:
    """Every ICD-10 list code its declared edition does not have, and unreadable tables.

    Args:
        code_lists: The lists to check; lists of other systems are passed over, and a list
            given twice (by two definitions) is checked once.
    """
    editions = _Editions()
    problems: list[Problem] = []
    seen: set[Path] = set()
    for code_list in code_lists:
        if code_list.system != "ICD10" or code_list.file.resolve() in seen:
            continue
        seen.add(code_list.file.resolve())
        edition = editions.of(code_list)
        if isinstance(edition, list):
            problems += edition
            continue
        what = "code or the start of one" if code_list.match == "prefix" else "code"
        problems += [
            Problem(
                code_list.file,
                row.line,
                0,
                "not-in-edition",
                f"'{row.code}' is not a {what} of {edition.name}, the list's edition "
                f"({code_list.edition})",
            )
            for row in code_list.codes
            if not edition.knows(row.code, code_list.match)
        ]
    return sorted(set(problems))
