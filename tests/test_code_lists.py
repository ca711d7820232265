"""Code lists as files: the format, its located errors, and evidence that names lists."""

from __future__ import annotations

import datetime as dt
import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.compile import compile_study
from pipeline.compile._context import evidence_number
from pipeline.config import load_code_list, load_study
from pipeline.engine import DuckDBEngine
from pipeline.errors import ConfigError
from pipeline.extract import discover_extract

from .conftest import DEMO_STUDY, ROOT

HEADER = """\
list: {name}
title: Test codes
system: {system}
edition: {edition}
match: {match}
version: "1.0"
date: 2026-12-05
author: Orvane Bay research network
source: our own, for the tests
licence: made-up codes, free to use
"""


def write_list(
    folder: Path,
    name: str,
    rows: str,
    *,
    system: str = "ICD10",
    edition: str = "WHO",
    match: str = "prefix",
    header: str | None = None,
) -> Path:
    """Write ``name.csv`` (``rows`` under the header line) and ``name.list.yaml``."""
    folder.mkdir(parents=True, exist_ok=True)
    csv_file = folder / f"{name}.csv"
    csv_file.write_text("code,term,excluded,reviewer\n" + rows, encoding="utf-8")
    text = header if header is not None else HEADER
    (folder / f"{name}.list.yaml").write_text(
        text.format(name=name, system=system, edition=edition, match=match), encoding="utf-8"
    )
    return csv_file


def problems_of(path: Path) -> list[str]:
    with pytest.raises(ConfigError) as caught:
        load_code_list(path)
    return [f"{p.file.name}:{p.line} [{p.code}]" for p in caught.value.problems]


def test_a_list_loads_with_its_metadata(tmp_path: Path) -> None:
    path = write_list(
        tmp_path,
        "dm",
        "E11,Type 2 diabetes mellitus,,A.B.\nE11.9,Type 2 diabetes without complications,yes,\n",
    )
    code_list = load_code_list(path)
    assert (code_list.name, code_list.system, code_list.edition, code_list.match) == (
        "dm",
        "ICD10",
        "WHO",
        "prefix",
    )
    assert code_list.header.date == dt.date(2026, 12, 5)
    assert code_list.header.licence == "made-up codes, free to use"
    assert code_list.included() == ("E11",)
    assert code_list.excluded() == ("E11.9",)
    assert code_list.terms["E11"] == "Type 2 diabetes mellitus"
    assert code_list.codes[0].extra == (("reviewer", "A.B."),)
    assert code_list.codes[1].line == 3
    # the header file names the same list
    assert load_code_list(tmp_path / "dm.list.yaml") == code_list


def test_code_of_the_wrong_shape(tmp_path: Path) -> None:
    path = write_list(tmp_path, "bad", "E11,Type 2 diabetes,,\n250,Diabetes (ICD-9),,\n")
    assert problems_of(path) == ["bad.csv:3 [code-shape]"]


def test_duplicate_code_with_two_terms(tmp_path: Path) -> None:
    rows = (
        "E11,Type 2 diabetes,,\nN18.3,CKD stage 3,,\ne11,Diabetes type 2,,\nE11,Type 2 diabetes,,\n"
    )
    # the same code again with the same term is harmless; with another term it is refused
    assert problems_of(write_list(tmp_path, "dup", rows)) == ["dup.csv:4 [duplicate-code]"]


def test_code_both_included_and_excluded(tmp_path: Path) -> None:
    rows = (
        "E11,Type 2 diabetes,,\nE11.9,Without complications,yes,\nE11.9,Without complications,,\n"
    )
    assert problems_of(write_list(tmp_path, "both", rows)) == ["both.csv:4 [included-and-excluded]"]


def test_missing_metadata_field(tmp_path: Path) -> None:
    header = HEADER.replace("licence: made-up codes, free to use\n", "")
    path = write_list(tmp_path, "nolicence", "E11,Type 2 diabetes,,\n", header=header)
    with pytest.raises(ConfigError) as caught:
        load_code_list(path)
    (problem,) = caught.value.problems
    assert (problem.file.name, problem.line, problem.code) == (
        "nolicence.list.yaml",
        1,
        "missing-key",
    )
    assert "'licence' is required" in problem.message


def test_unknown_system(tmp_path: Path) -> None:
    path = write_list(tmp_path, "icd11", "5A11,Type 2 diabetes,,\n", system="ICD11")
    with pytest.raises(ConfigError) as caught:
        load_code_list(path)
    (problem,) = caught.value.problems
    assert str(problem).endswith(
        "icd11.list.yaml:3:9 [unknown-system] unknown coding system 'ICD11'; known: ICD10, "
        "ICD9, SNOMED, READ2, ICPC2, ATC"
    )


def test_unreadable_file(tmp_path: Path) -> None:
    path = write_list(tmp_path, "latin", "E11,Type 2 diabetes,,\n")
    path.write_bytes("code,term\nE11,Diab\xe8te de type 2\n".encode("latin-1"))
    assert problems_of(path) == ["latin.csv:0 [unreadable]"]


def _definitions_using(tmp_path: Path, evidence: str) -> Path:
    """A copy of the demo definitions whose type 2 diabetes codes are ``evidence``."""
    definitions = tmp_path / "definitions"
    shutil.copytree(ROOT / "definitions", definitions)
    file = definitions / "conditions" / "type2_diabetes.yaml"
    text = file.read_text(encoding="utf-8")
    start = text.index("  dm_code:")
    end = text.index("  dm_drug:")
    file.write_text(text[:start] + evidence + text[end:], encoding="utf-8")
    return definitions


def test_an_unreadable_list_is_named_where_the_definition_names_it(tmp_path: Path) -> None:
    definitions = _definitions_using(
        tmp_path, "  dm_code:\n    diagnosis:\n      lists: [../codelists/missing.csv]\n"
    )
    with pytest.raises(ConfigError) as caught:
        load_study(definitions / "studies" / "orvane_multimorbidity.yaml")
    (problem,) = caught.value.problems
    assert (problem.file.name, problem.line, problem.column, problem.code) == (
        "type2_diabetes.yaml",
        19,
        15,
        "unreadable",
    )
    assert "code list '../codelists/missing.csv'" in problem.message


def test_build_refuses_a_bad_list_and_writes_nothing(tmp_path: Path) -> None:
    definitions = _definitions_using(
        tmp_path, "  dm_code:\n    diagnosis:\n      lists: [../codelists/dm.csv]\n"
    )
    write_list(definitions / "codelists", "dm", "E11,Type 2 diabetes,,\nE1,Too short,,\n")
    out = tmp_path / "out"
    study = definitions / "studies" / "orvane_multimorbidity.yaml"
    result = CliRunner().invoke(app, ["build", str(study), "--out", str(out)])
    assert result.exit_code == 2, result.output
    assert "dm.csv:3 [code-shape] 'E1' is not a valid ICD-10 code" in result.output
    assert not out.exists()


INLINE_DM = """\
  dm_code:
    diagnosis:
      ICD10: [E11]
      ICD9: ["250"]
      exclude:
        ICD9: ["250.01", "250.11", "250.21", "250.31", "250.41", "250.51", "250.61", "250.71",
               "250.81", "250.91", "250.03", "250.13", "250.23", "250.33", "250.43", "250.53",
               "250.63", "250.73", "250.83", "250.93"]
"""


def _plan_sql(definitions: Path) -> str:
    loaded = load_study(definitions / "studies" / "orvane_multimorbidity.yaml")
    return compile_study(loaded).describe()


TYPE1 = [f"250.{d}{t}" for d in range(10) for t in (1, 3)]


def test_a_list_compiles_to_the_same_sql_as_its_codes_inline(tmp_path: Path) -> None:
    inline = _definitions_using(tmp_path / "inline", INLINE_DM)
    # type 1 codes as a list named under exclude
    listed = _definitions_using(
        tmp_path / "listed",
        "  dm_code:\n    diagnosis:\n      lists: [../codelists/dm_icd10.csv]\n"
        "      ICD9: ['250']\n"
        "      exclude: {lists: [../codelists/dm_type1_icd9.csv]}\n",
    )
    write_list(listed / "codelists", "dm_icd10", "E11,Type 2 diabetes mellitus,,\n")
    type1 = "".join(f"{c},Diabetes type I ({c}),,\n" for c in TYPE1)
    write_list(listed / "codelists", "dm_type1_icd9", type1, system="ICD9", edition="ICD-9-CM")
    # type 1 codes as excluded rows of one list, as a clinician would review them
    marked = _definitions_using(
        tmp_path / "marked",
        "  dm_code:\n    diagnosis:\n"
        "      lists: [../codelists/dm_icd10.csv, ../codelists/dm_icd9.csv]\n",
    )
    write_list(marked / "codelists", "dm_icd10", "E11,Type 2 diabetes mellitus,,\n")
    rows = "250,Diabetes mellitus,,\n" + "".join(f"{c},Diabetes type I ({c}),yes,\n" for c in TYPE1)
    write_list(marked / "codelists", "dm_icd9", rows, system="ICD9", edition="ICD-9-CM")
    assert _plan_sql(listed) == _plan_sql(inline)
    assert _plan_sql(marked) == _plan_sql(inline)
    # and the demo's own SQL is that of the inline codes
    assert _plan_sql(inline) == compile_study(load_study(DEMO_STUDY)).describe()


def _matched_patients(tmp_path: Path, definitions: Path, codes: list[tuple[str, str]]) -> set[str]:
    """Patients (one per extract code) whose diagnosis the type 2 diabetes codes match."""
    extract = tmp_path / "extract"
    extract.mkdir()
    (extract / "patients.csv").write_text(
        "patient_id,birth_date,sex,death_date\n"
        + "".join(f"p{i},1950-01-01,F,\n" for i in range(len(codes))),
        encoding="utf-8",
    )
    (extract / "diagnoses.csv").write_text(
        "patient_id,event_date,code_system,code,source\n"
        + "".join(f"p{i},2015-01-01,{s},{c},billing\n" for i, (s, c) in enumerate(codes)),
        encoding="utf-8",
    )
    (extract / "prescriptions.csv").write_text("patient_id,start_date,atc\n", encoding="utf-8")
    loaded = load_study(definitions / "studies" / "orvane_multimorbidity.yaml")
    plan = compile_study(loaded).through("coded_evidence_days", order=("patient_id", "event_date"))
    result = DuckDBEngine(threads=1).run(plan, discover_extract(extract, plan.sources))
    wanted = evidence_number("type2_diabetes.dm_code")
    rows = result.outputs["coded_evidence_days"].to_pylist()
    return {codes[int(r["patient_id"][1:])][1] for r in rows if r["evidence"] == wanted}


EXTRACT_ICD10 = [("ICD10", c) for c in ("E11", "E11.9", "E11.90", "E119", "E10.9", "e11.9")]


@pytest.mark.parametrize(
    ("match", "expected"),
    [
        # exact: the code itself in any spelling the normalisation accepts, never a longer one
        ("exact", {"E11.9", "E119", "e11.9"}),
        # prefix: the code and every code below it
        ("prefix", {"E11.9", "E11.90", "E119", "e11.9"}),
    ],
)
def test_lists_match_exactly_or_by_prefix(tmp_path: Path, match: str, expected: set[str]) -> None:
    definitions = _definitions_using(
        tmp_path, "  dm_code:\n    diagnosis:\n      lists: [../codelists/dm.csv]\n"
    )
    write_list(
        definitions / "codelists", "dm", "E11.9,Type 2 diabetes no complications,,\n", match=match
    )
    assert _matched_patients(tmp_path, definitions, EXTRACT_ICD10) == expected


def test_a_study_cannot_name_lists_in_its_own_evidence(tmp_path: Path) -> None:
    # Refused rather than ignored: an ignored list would silently match nothing.
    definitions = tmp_path / "definitions"
    shutil.copytree(ROOT / "definitions", definitions)
    study = definitions / "studies" / "orvane_multimorbidity.yaml"
    text = study.read_text(encoding="utf-8")
    old = "  visits_prior_year: {count: {encounter: {}}, window: [-365, -1]}"
    assert old in text
    new = (
        "  hf_codes: {count: {diagnosis: {lists: [../codelists/heart_failure_icd10.csv]}}, "
        "window: [-365, -1]}"
    )
    study.write_text(text.replace(old, old + "\n" + new), encoding="utf-8")
    with pytest.raises(ConfigError) as caught:
        load_study(study)
    (problem,) = caught.value.problems
    line = next(i for i, t in enumerate(text.splitlines(), 1) if t.startswith(old)) + 1
    assert (problem.line, problem.code) == (line, "list-in-study")
