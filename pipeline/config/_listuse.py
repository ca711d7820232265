"""The code lists a definition's evidence names, read and checked when the definition loads.

Compiling stays pure: the loader reads every list once here and hands the checked lists to the
compiler through the catalog (``Catalog.code_lists``), by condition and evidence name.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from pipeline.codes import DIAGNOSIS_SYSTEMS, SYSTEM_NAMES
from pipeline.config._codelist import CodeList, header_file_of, load_code_list
from pipeline.config._condition import Condition, Evidence
from pipeline.config._yaml import LocatedDocument, PathKey
from pipeline.errors import ConfigError, Problem

# Which systems a list may be in, by the kind of evidence that names it.
KIND_SYSTEMS = {"diagnosis": DIAGNOSIS_SYSTEMS, "prescription": ("ATC",)}


@dataclass(frozen=True)
class ListUse:
    """One code list named by one piece of evidence.

    Attributes:
        code_list: The checked list.
        excluded: Named under ``exclude``: every code of the list is an exclusion.
    """

    code_list: CodeList
    excluded: bool


EvidenceLists = dict[str, tuple[ListUse, ...]]


def _references(name: str, ev: Evidence) -> list[tuple[PathKey, str, bool, str]]:
    """(path in the file, list file as written, under exclude, evidence kind) of each list."""
    found: list[tuple[PathKey, str, bool, str]] = []
    if ev.diagnosis:
        base: PathKey = ("evidence", name, "diagnosis")
        found += [
            ((*base, "lists", i), ref, False, "diagnosis")
            for i, ref in enumerate(ev.diagnosis.lists)
        ]
        if ev.diagnosis.exclude:
            found += [
                ((*base, "exclude", "lists", i), ref, True, "diagnosis")
                for i, ref in enumerate(ev.diagnosis.exclude.lists)
            ]
    if ev.prescription:
        base = ("evidence", name, "prescription")
        found += [
            ((*base, "lists", i), ref, False, "prescription")
            for i, ref in enumerate(ev.prescription.lists)
        ]
    return found


def _located(
    doc: LocatedDocument, path: PathKey, ref: str, file: Path, err: ConfigError
) -> list[Problem]:
    """The list's problems; a file that cannot be read at all is named where the list is named."""
    unreadable = {file, header_file_of(file)}
    return [
        doc.problem(path, p.code, f"code list '{ref}': {p.message} ({p.file.name})", at_value=True)
        if p.line == 0 and p.file in unreadable
        else p
        for p in err.problems
    ]


def read_lists(doc: LocatedDocument, condition: Condition) -> tuple[EvidenceLists, list[Problem]]:
    """Every list the condition's evidence names, by evidence, and the problems found.

    A list file is named relative to the definition file.
    """
    lists: dict[str, list[ListUse]] = {}
    problems: list[Problem] = []
    for name, ev in condition.evidence.items():
        for path, ref, excluded, kind in _references(name, ev):
            file = (doc.file.parent / ref).resolve()
            try:
                code_list = load_code_list(file)
            except ConfigError as err:
                problems += _located(doc, path, ref, file, err)
                continue
            if code_list.system not in KIND_SYSTEMS[kind]:
                allowed = ", ".join(SYSTEM_NAMES[s] for s in KIND_SYSTEMS[kind])
                problems.append(
                    doc.problem(
                        path,
                        "wrong-system",
                        f"code list '{ref}' is in {SYSTEM_NAMES[code_list.system]}; {kind} "
                        f"evidence reads {allowed}",
                        at_value=True,
                    )
                )
                continue
            lists.setdefault(name, []).append(ListUse(code_list, excluded))
    return {name: tuple(uses) for name, uses in lists.items()}, problems
