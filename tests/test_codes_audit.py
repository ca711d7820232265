"""``ascertain codes``: the code audit, checked on a hand-made extract and on the demo extract.

The hand-made expectations are worked out row by row in tests/fixtures/codes_audit/README.md.
"""

from __future__ import annotations

import csv
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.workflows._codes_files import release, write_audit
from pipeline.workflows.codes import audit_codes, parent_of

from .conftest import DEMO_STUDY, ROOT
from .helpers import run_stage

FIXTURE = ROOT / "tests" / "fixtures" / "codes_audit"
STUDY = FIXTURE / "study.yaml"

EXPECTED = {
    f.name: f.read_text(encoding="utf-8") for f in sorted((FIXTURE / "expected").glob("*.csv"))
}
"""The audit's CSVs as worked out by hand (README.md of the fixture), never by the tool."""


def test_handmade_audit_matches_the_counts_worked_out_by_hand(tmp_path: Path) -> None:
    out = tmp_path / "codes"
    result = CliRunner().invoke(app, ["codes", str(STUDY), "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert result.output.startswith("Patient-level detail")
    for name, text in EXPECTED.items():
        assert (out / name).read_text(encoding="utf-8") == text, name
    assert (out / "ascertain-codes.json").exists()
    # the same inputs give the same bytes
    again = tmp_path / "again"
    CliRunner().invoke(app, ["codes", str(STUDY), "--out", str(again)])
    assert all((again / n).read_bytes() == (out / n).read_bytes() for n in EXPECTED)


def test_refuses_a_folder_it_did_not_write_and_touches_nothing(tmp_path: Path) -> None:
    out = tmp_path / "mine"
    out.mkdir()
    (out / "notes.txt").write_text("keep me", encoding="utf-8")
    result = CliRunner().invoke(app, ["codes", str(STUDY), "--out", str(out)])
    assert result.exit_code == 2
    assert "notes.txt" in result.output
    assert sorted(p.name for p in out.iterdir()) == ["notes.txt"]


def test_lives_beside_a_build_in_its_folder(tmp_path: Path) -> None:
    out = tmp_path / "build"
    assert CliRunner().invoke(app, ["build", str(STUDY), "--out", str(out)]).exit_code == 0
    assert CliRunner().invoke(app, ["codes", str(STUDY), "--out", str(out)]).exit_code == 0
    # a rebuild leaves the audit (it describes the extract and definitions, not the cohort)
    assert CliRunner().invoke(app, ["build", str(STUDY), "--out", str(out)]).exit_code == 0
    assert (out / "codes_matched.csv").read_text(encoding="utf-8") == EXPECTED["codes_matched.csv"]


def _cells(rows: list[dict], *names: str) -> list[object]:
    return [row[name] for row in rows for name in names]


def test_release_hides_small_counts_and_what_gives_them_away(tmp_path: Path) -> None:
    audit = audit_codes(STUDY)
    assert audit.threshold == 2
    released = release(audit)
    counts = _cells(released.matched, "rows", "patients") + _cells(
        released.by_year, "rows", "patients"
    )
    counts += _cells(released.near_misses, "rows", "patients")
    # primary: no count of 1 is shown
    assert 1 not in counts
    assert "<2" in counts
    # a code's years add up to its rows: never exactly one of them hidden with the total shown
    for line in released.matched:
        key = (line["definition"], line["evidence"], line["system"], line["code_raw"])
        years = [
            y["rows"]
            for y in released.by_year
            if (y["definition"], y["evidence"], y["system"], y["code_raw"]) == key
        ]
        if isinstance(line["rows"], int):
            assert sum(isinstance(y, str) for y in years) != 1, (key, line["rows"], years)
    # rows of fewer patients than the threshold are withheld with them
    for row in released.matched + released.by_year + released.near_misses:
        if isinstance(row["patients"], str):
            assert isinstance(row["rows"], str), row
    # the written copy is the released one
    write_audit(audit, tmp_path / "r", for_release=True)
    with (tmp_path / "r" / "codes_by_year.csv").open(encoding="utf-8") as handle:
        assert [r["rows"] for r in csv.DictReader(handle)] == [
            str(r["rows"]) for r in released.by_year
        ]


@pytest.mark.parametrize(
    ("system", "code", "expected"),
    [
        ("ICD10", "E1165", {"E11"}),
        ("ICD9", "25000", {"250"}),
        ("ICD9", "E8501", {"E850"}),  # ICD-9-CM external causes: four-character categories
        ("READ2", "C10F7", {"C10F"}),
        ("READ2", "C", set()),
        ("ICPC2", "T90", {"T70-99"}),  # ICPC-2 components, from memory
        ("ICPC2", "T08", {"T01-29"}),
        ("ICPC2", "K31", {"K30-69"}),
        ("ATC", "A10BA02", {"A10BA"}),
        ("ATC", "A10B", {"A10"}),
        ("ATC", "A10", {"A"}),
        ("SNOMED", "44054006", set()),  # no hierarchy given
    ],
)
def test_parents_that_near_misses_share(system: str, code: str, expected: set[str]) -> None:
    assert parent_of(system, code, {}) == expected


def test_snomed_parents_come_from_the_hierarchy() -> None:
    assert parent_of("SNOMED", "2", {"2": {"1", "9"}}) == {"1", "9"}


@pytest.mark.slow
def test_demo_totals_agree_with_the_quality_log() -> None:
    audit = audit_codes(DEMO_STUDY)
    quality = run_stage(ROOT / "synthetic_extract", "quality_log", order=())
    used = {r["source_table"]: r["n_rows"] for r in quality if r["outcome"] == "used"}
    for total in audit.totals:
        assert total["used_rows"] == used[total["table"]], total
        assert total["matched_rows"] + total["unmatched_rows"] == total["used_rows"]
        assert 0 < total["matched_rows"] < total["used_rows"]
    # each line's rows are the sum of its years
    years: dict[tuple, int] = {}
    for row in audit.by_year:
        key = (row["definition"], row["evidence"], row["system"], row["code_raw"])
        years[key] = years.get(key, 0) + row["rows"]
    for row in audit.matched:
        key = (row["definition"], row["evidence"], row["system"], row["code_raw"])
        assert years[key] == row["rows"]


def test_a_study_without_coded_evidence_is_refused_with_its_file(tmp_path: Path) -> None:
    definitions = tmp_path / "definitions"
    definitions.mkdir()
    (definitions / "high_a1c.yaml").write_text(
        "condition: high_a1c\ntitle: High HbA1c\nabout: A fixture.\n"
        "provenance: {adapts: our own, icd_edition: none, version: '1.0', date: 2026-12-05}\n"
        "evidence:\n  a1c: {measurement: {measure: hba1c, at_least: 6.5 %}}\n"
        "rules:\n  - {name: one result, need: {a1c: 1}}\n"
        "onset: rule_met\n",
        encoding="utf-8",
    )
    text = STUDY.read_text(encoding="utf-8")
    text = text.replace("extract: .", f"extract: {FIXTURE.as_posix()}")
    text = text.replace("[diabetes, heart_failure]", "[high_a1c]")
    study = tmp_path / "study.yaml"
    study.write_text(text, encoding="utf-8")
    result = CliRunner().invoke(app, ["codes", str(study), "--out", str(tmp_path / "out")])
    assert result.exit_code == 2
    assert "no diagnosis or prescription evidence" in result.output
    assert "study.yaml" in result.output
    assert not (tmp_path / "out").exists()


def test_audit_reads_the_row_judgement_not_the_extract() -> None:
    # The usable-row rule lives in the row-judgement views (compile/_judged.py); the audit
    # reads them, so it cannot state the rule again over the raw tables.
    from pipeline.compile import compile_study, names
    from pipeline.compile._audit import audit_plan
    from pipeline.compile._context import CompileContext
    from pipeline.config import load_study

    loaded = load_study(DEMO_STUDY)
    ctx = CompileContext(loaded.study, loaded.catalog, loaded.measures)
    used = audit_plan(compile_study(loaded), ctx).stage("audit_used")
    assert set(used.depends_on) == {
        names.judged_stage("diagnoses"),
        names.judged_stage("prescriptions"),
        names.DISTINCT_CODES,
    }
    sql = used.render("duckdb")
    assert "src_" not in sql
    assert "death_date" not in sql
    assert "source_problem" not in sql
