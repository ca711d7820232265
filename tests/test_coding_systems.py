"""Coding systems beyond ICD: SNOMED CT, Read v2 and ICPC-2 shapes, lists and extract rows.

Every SNOMED CT identifier here is made up (item numbers 99000xx, partition 00, a valid
Verhoeff check digit): none is a real concept.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from pipeline.codes import check_code, normalise_in, verhoeff_check_digit, verhoeff_valid
from pipeline.config import load_code_list
from pipeline.errors import ConfigError

from .test_code_lists import _definitions_using, _matched_patients, write_list

# Made-up concepts: a parent, its child, the child's child, and an unrelated one.
PARENT, CHILD, GRANDCHILD, OTHER = "9900001008", "9900002001", "9900003006", "9900004000"


@pytest.mark.parametrize(("digits", "check"), [("236", 3), ("12345", 1), ("142857", 0)])
def test_verhoeff_published_examples(digits: str, check: int) -> None:
    # Source: the worked examples published with the Verhoeff algorithm (its Wikipedia page:
    # 236 -> 3, 12345 -> 1, 142857 -> 0), from memory, and confirmed by computing them here.
    assert verhoeff_check_digit(digits) == check
    assert verhoeff_valid(digits + str(check))
    assert not verhoeff_valid(digits + str((check + 1) % 10))


def test_verhoeff_catches_a_transposition() -> None:
    # The algorithm detects every swap of adjacent digits (Verhoeff 1969): 2363 -> 3263.
    assert verhoeff_valid("2363")
    assert not verhoeff_valid("3263")


def test_snomed_identifier_checks() -> None:
    assert check_code("SNOMED", PARENT) == PARENT
    with pytest.raises(ValueError, match="Verhoeff check digit"):
        check_code("SNOMED", "9900001009")
    # partition 01 (a description), valid check digit: not a concept
    with pytest.raises(ValueError, match="partition 01"):
        check_code("SNOMED", "9900001012")
    with pytest.raises(ValueError, match="6 to 18 digits"):
        check_code("SNOMED", "01234")


def test_read2_keeps_case_and_strips_trailing_dots_only() -> None:
    # Read v2: five characters, case significant, dots as padding (common practice, from memory).
    assert normalise_in("READ2", "H33z.") == "H33z"
    assert normalise_in("READ2", "H33Z.") == "H33Z"
    assert normalise_in("READ2", " G30.. ") == "G30"
    assert check_code("READ2", "G30..") == "G30.."
    for bad in ("G30...", "G.30", "G30-1"):
        with pytest.raises(ValueError, match="Read v2"):
            check_code("READ2", bad)


def test_icpc2_shapes() -> None:
    # ICPC-2 (WONCA): 17 chapter letters (no C, E, G, ...), two digits, optional extension.
    for good in ("T90", "K86", "K86.01", "A", "r96"):
        assert check_code("ICPC2", good) == good
    for bad in ("C10", "T9", "T9A", "K86.001"):
        with pytest.raises(ValueError, match="ICPC-2"):
            check_code("ICPC2", bad)


def test_snomed_list_widens_through_a_parent_child_table(tmp_path: Path) -> None:
    (tmp_path / "is_a.csv").write_text(
        f"parent,child\n{PARENT},{CHILD}\n{CHILD},{GRANDCHILD}\n", encoding="utf-8"
    )
    write_list(tmp_path, "x", f"{PARENT},Parent,,\n", system="SNOMED", match="exact")
    with (tmp_path / "x.list.yaml").open("a", encoding="utf-8") as handle:
        handle.write("descendants_from: is_a.csv\n")
    code_list = load_code_list(tmp_path / "x.csv")
    assert code_list.included() == (PARENT, CHILD, GRANDCHILD)
    assert tmp_path / "is_a.csv" in code_list.files


def test_snomed_list_widens_through_a_release_relationship_file(tmp_path: Path) -> None:
    # Release format columns (SNOMED CT RF2 relationship file, from memory); only active is-a
    # rows (typeId 116680003) count: the inactive row and the other relationship type do not.
    header = "id\teffectiveTime\tactive\tmoduleId\tsourceId\tdestinationId\trelationshipGroup"
    header += "\ttypeId\tcharacteristicTypeId\tmodifierId\n"
    rows = [
        f"1\t20240101\t1\t1\t{CHILD}\t{PARENT}\t0\t116680003\t1\t1",
        f"2\t20240101\t0\t1\t{GRANDCHILD}\t{CHILD}\t0\t116680003\t1\t1",
        f"3\t20240101\t1\t1\t{OTHER}\t{PARENT}\t0\t999\t1\t1",
    ]
    (tmp_path / "rel.txt").write_text(header + "\n".join(rows) + "\n", encoding="utf-8")
    write_list(tmp_path, "x", f"{PARENT},Parent,,\n", system="SNOMED", match="exact")
    with (tmp_path / "x.list.yaml").open("a", encoding="utf-8") as handle:
        handle.write("descendants_from: rel.txt\n")
    assert load_code_list(tmp_path / "x.csv").included() == (PARENT, CHILD)


def test_snomed_lists_must_match_exactly(tmp_path: Path) -> None:
    path = write_list(tmp_path, "x", f"{PARENT},Parent,,\n", system="SNOMED", match="prefix")
    with pytest.raises(ConfigError) as caught:
        load_code_list(path)
    assert [p.code for p in caught.value.problems] == ["bad-value"]


def test_snomed_read2_and_icpc2_rows_are_used_when_a_list_reads_them(tmp_path: Path) -> None:
    definitions = _definitions_using(
        tmp_path,
        "  dm_code:\n    diagnosis:\n      lists: [../codelists/sct.csv, ../codelists/read.csv,"
        " ../codelists/icpc.csv]\n",
    )
    folder = definitions / "codelists"
    write_list(folder, "sct", f"{CHILD},Child concept,,\n", system="SNOMED", match="exact")
    write_list(folder, "read", "C10F.,Made-up Read code,,\n", system="READ2", edition="v2")
    write_list(
        folder, "icpc", "T90,Diabetes non-insulin dependent,,\n", system="ICPC2", edition="ICPC-2"
    )
    extract = [
        ("SNOMED", CHILD),
        ("SNOMED", PARENT),  # not in the list; SNOMED is exact
        ("SNOMED", GRANDCHILD),  # no hierarchy given: not widened
        ("READ2", "C10F."),
        ("READ2", "C10F1"),  # below C10F: a prefix list counts it
        ("READ2", "c10f."),  # another code: Read v2 is case-sensitive
        ("ICPC2", "t90"),
        ("ICPC2", "T90.01"),
        ("ICD10", "E11"),  # no ICD-10 list any more
    ]
    found = _matched_patients(tmp_path, definitions, extract)
    assert found == {CHILD, "C10F.", "C10F1", "t90", "T90.01"}
