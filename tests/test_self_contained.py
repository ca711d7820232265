"""The repository stands on its own: nothing cites a document or a path outside it.

Tests, fixtures and code cite the demo study's specification
(``definitions/studies/orvane_multimorbidity.md``, "the demo spec") by section number; every
cited section must exist there, so renumbering the specification without updating its
citations fails here.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from .conftest import ROOT

SPEC = ROOT / "definitions" / "studies" / "orvane_multimorbidity.md"

# What the project consists of (the fixed top-level layout); venvs, outputs, caches are not.
PROJECT = ("README.md", "DEVELOPERS.md", "pyproject.toml", "pipeline", "definitions", "tests",
           "synthetic_extract", "benchmarks", ".ci")  # fmt: skip
TEXT_SUFFIXES = {".py", ".md", ".yaml", ".yml", ".toml", ".csv", ".json", ".ndjson", ".txt", ""}

# Written in pieces so that this file does not match itself.
FORBIDDEN = [
    re.compile("/" + "work/"),
    re.compile(r"\.\./" + "shared"),
    re.compile("/" + r"tmp/\w"),
    re.compile("REFERENCE" + "_VALUES"),
    re.compile(r"\b(DEMO_STUDY|DESIGN|STYLE)" + r"\.md\b"),
    re.compile(r"(?<![\w./])/home/\w"),
]
CITATION = re.compile(r"§\s?(\d+(?:\.\d+)?)")


def _project_text_files() -> list[Path]:
    files: list[Path] = []
    for name in PROJECT:
        top = ROOT / name
        candidates = [top] if top.is_file() else sorted(top.rglob("*"))
        for path in candidates:
            if not path.is_file() or path.suffix not in TEXT_SUFFIXES:
                continue
            if "__pycache__" in path.parts:
                continue
            files.append(path)
    return files


def _spec_sections() -> set[str]:
    text = SPEC.read_text(encoding="utf-8")
    chapters = re.findall(r"^## (\d+)\. ", text, flags=re.MULTILINE)
    sections = re.findall(r"^\*\*(\d+\.\d+) ", text, flags=re.MULTILINE)
    return set(chapters) | set(sections)


def test_no_file_cites_a_path_or_document_outside_the_repository() -> None:
    files = _project_text_files()
    assert len(files) > 100  # the walk really reaches tests, fixtures and the package
    found = []
    for path in files:
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            found += [
                f"{path.relative_to(ROOT)}:{number}: {line.strip()}"
                for pattern in FORBIDDEN
                if pattern.search(line)
            ]
    assert found == []


def test_every_cited_section_of_the_demo_spec_exists() -> None:
    sections = _spec_sections()
    assert {"1", "2.6", "3.5", "4.2", "6"} <= sections
    cited: dict[str, list[str]] = {}
    for path in _project_text_files():
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            for section in CITATION.findall(line):
                cited.setdefault(section, []).append(f"{path.relative_to(ROOT)}:{number}")
    assert "3.3" in cited  # the walk sees the citations in tests and fixtures
    missing = {s: where for s, where in cited.items() if s not in sections}
    assert missing == {}


@pytest.mark.parametrize(
    "document",
    [
        "README.md",
        "DEVELOPERS.md",
        "tests/fixtures/handmade/README.md",
        "tests/fixtures/handmade_measures/README.md",
        "tests/fixtures/designs/fixed_date/README.md",
        "tests/oracle.py",
    ],
)
def test_the_demo_spec_is_named_where_its_semantics_are_relied_on(document: str) -> None:
    text = (ROOT / document).read_text(encoding="utf-8")
    assert "definitions/studies/orvane_multimorbidity.md" in " ".join(text.split())
