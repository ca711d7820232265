"""``ascertain validate`` on a tiny extract with a hand-written reference standard."""

from __future__ import annotations

from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.errors import AscertainError
from pipeline.stats import diagnostic_accuracy, onset_agreement
from pipeline.stats._disclosure import feasible_range
from pipeline.workflows.validate import (
    Validation,
    render_validation,
    validate_study,
    validation_cells,
)

from .conftest import DEMO_STUDY
from .helpers import write_extract


def _dx(pid: str, day: str) -> dict:
    return {"patient_id": pid, "event_date": day, "code_system": "ICD10", "code": "E11.9"}


@pytest.fixture
def extract(tmp_path: Path) -> Path:
    return write_extract(
        tmp_path / "x",
        {
            "patients": [
                {"patient_id": p, "birth_date": "1950-01-01", "sex": "F"} for p in "ABCDE"
            ],
            "diagnoses": [
                _dx("A", "2014-01-01"),
                _dx("A", "2014-03-01"),  # case on 2014-03-01
                _dx("B", "2014-01-01"),  # one code: not a case
                _dx("C", "2015-01-01"),
                _dx("C", "2015-02-01"),  # case on 2015-02-01
            ],
        },
    )


def test_four_cells_by_hand(tmp_path: Path, extract: Path) -> None:
    reference = tmp_path / "reference.csv"
    reference.write_text(
        "# coverage: complete\n"
        "patient_id,condition,status,date\n"
        "A,type2_diabetes,true,2014-01-20\n"  # TP, definition 40 days later
        "B,type2_diabetes,1,2013-12-01\n"  # FN
        "C,type2_diabetes,false,\n"  # FP
        "D,type2_diabetes,0,\n",  # TN (E has no row: TN too)
        encoding="utf-8",
    )
    (result,) = validate_study(DEMO_STUDY, reference, extract=extract)
    a = result.accuracy
    assert (result.condition, a.tp, a.fp, a.fn, a.tn) == ("type2_diabetes", 1, 1, 1, 2)
    assert a.sensitivity.estimate == pytest.approx(0.5)
    assert a.ppv.estimate == pytest.approx(0.5)
    assert a.specificity.estimate == pytest.approx(2 / 3)
    assert (result.onsets.n, result.onsets.median_difference) == (1, 40)


def test_ground_truth_layout_and_suppressed_output(tmp_path: Path, extract: Path) -> None:
    truth = tmp_path / "truth.csv"
    truth.write_text(
        "patient_id,condition,true_onset_date\n"
        "A,type2_diabetes,2014-03-01\nC,type2_diabetes,2021-01-01\nD,type2_diabetes,\n",
        encoding="utf-8",
    )
    args = ["validate", str(DEMO_STUDY), "--reference", str(truth), "--extract", str(extract)]
    output = CliRunner().invoke(app, args).output
    # C's true onset is after the end of data (2019-12-31): the reference calls it no case.
    assert "type2_diabetes: tp <5, fp <5, fn 0, tn <5" in output
    # tp is hidden, so sensitivity (tp / (tp + fn) = 1.000) would give it back: not printed.
    assert "sensitivity  suppressed" in output
    assert "1.000" not in output


def test_reference_with_unknown_columns(tmp_path: Path, extract: Path) -> None:
    bad = tmp_path / "bad.csv"
    bad.write_text("id,disease\nA,x\n", encoding="utf-8")
    with pytest.raises(AscertainError, match="a reference needs columns patient_id, condition"):
        validate_study(DEMO_STUDY, bad, extract=extract)


def _validation(tp: int, fp: int, fn: int, tn: int, dated: int) -> Validation:
    differences = [0] * dated
    return Validation(
        "ckd",
        diagnostic_accuracy(tp=tp, fp=fp, fn=fn, tn=tn),
        onset_agreement(differences),
        patients=tp + fp + fn + tn,
        positives=tp + fp,
    )


def test_validation_counts_cannot_be_worked_out_from_what_is_printed() -> None:
    # The case of issue 16: "tp <5, fp <5, fn 40" next to sensitivity 0.070 and PPV 0.600
    # gave tp = 3 and fp = 2 back. Now the statistics from hidden counts are not printed, and
    # the counts shown leave each hidden one at least 5 values wide (exact integer bounds).
    result = _validation(3, 2, 40, 955, dated=3)
    text = render_validation([result], 5)
    assert "ckd: tp <5, fp <5, fn *, tn *" in text
    for label in ("sensitivity", "specificity", "ppv", "npv", "kappa"):
        assert f"{label:<12} suppressed" in text
    assert "0.070" not in text
    assert "0.600" not in text
    assert "onset dates: suppressed (n <5)" in text
    assert "threshold 5" in text
    values, relations, _ = validation_cells([result])
    unknown = set(values) - {"total"}  # only the number of patients is known to a reader
    for cell in ("tp", "fp", "fn", "tn"):
        low, high = feasible_range(f"ckd|{cell}", values, relations, unknown)
        assert high - low >= 5, cell


def test_validation_with_large_counts_is_printed_whole() -> None:
    text = render_validation([_validation(60, 20, 40, 880, dated=50)], 5)
    assert "ckd: tp 60, fp 20, fn 40, tn 880" in text
    assert "sensitivity  0.600" in text
    assert "ppv          0.750" in text
    assert "(n 50)" in text


# --- the reference file: coverage, sampling design, status values, onsets ------------------


def _reference(tmp_path: Path, text: str, name: str = "reference.csv") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture
def clinic(tmp_path: Path) -> Path:
    """40 patients with encounters from 2012; 10 cases (P00-P09), 30 without codes."""
    patients = [f"P{i:02d}" for i in range(40)]
    return write_extract(
        tmp_path / "clinic",
        {
            "patients": [
                {"patient_id": p, "birth_date": "1950-01-01", "sex": "F"} for p in patients
            ],
            "encounters": [
                {"patient_id": p, "encounter_date": "2012-06-01", "encounter_type": "visit"}
                for p in patients
            ],
            "diagnoses": [_dx(p, d) for p in patients[:10] for d in ("2014-01-01", "2014-03-01")],
        },
    )


def test_a_reviewed_sample_leaves_the_unreviewed_out(tmp_path: Path, clinic: Path) -> None:
    # Three patients reviewed out of 40: before, the 37 others counted as true negatives
    # (the chart review of 3 gave tn 19,710). Now only the three count.
    reference = _reference(
        tmp_path,
        "# coverage: reviewed\n"
        "patient_id,condition,status\n"
        "P00,type2_diabetes,case\n"  # TP
        "P01,type2_diabetes,non-case\n"  # FP
        "P20,type2_diabetes,No\n",  # TN
    )
    (result,) = validate_study(DEMO_STUDY, reference, extract=clinic)
    a = result.accuracy
    assert (a.tp, a.fp, a.fn, a.tn) == (1, 1, 0, 1)
    assert a.ppv.estimate == pytest.approx(0.5)
    assert (result.coverage, result.patients, result.positives) == ("reviewed", 40, 10)
    with pytest.raises(AscertainError, match="declares coverage reviewed, the command line"):
        validate_study(DEMO_STUDY, reference, extract=clinic, coverage="complete")
    # The same rows declared complete: the 37 unlisted are negatives (8 more FP, 29 more TN).
    undeclared = _reference(tmp_path, reference.read_text().split("\n", 1)[1], "rows.csv")
    (complete,) = validate_study(DEMO_STUDY, undeclared, extract=clinic, coverage="complete")
    a = complete.accuracy
    assert (a.tp, a.fp, a.fn, a.tn) == (1, 9, 0, 30)
    with pytest.raises(AscertainError, match="give it once"):
        validate_study(DEMO_STUDY, reference, extract=clinic, coverage="complete")


def test_coverage_must_be_declared(tmp_path: Path, clinic: Path) -> None:
    reference = _reference(tmp_path, "patient_id,condition,status\nP00,type2_diabetes,1\n")
    with pytest.raises(AscertainError, match="declare the reference's coverage"):
        validate_study(DEMO_STUDY, reference, extract=clinic)
    (result,) = validate_study(DEMO_STUDY, reference, extract=clinic, coverage="reviewed")
    assert result.accuracy.tp == 1


@pytest.mark.parametrize(
    ("row", "message"),
    [
        ("P02,type2_diabetes,maybe", r"reference.csv:line 4: status 'maybe' of patient P02"),
        ("P02,type2_diabetes,", r"reference.csv:line 4: status None of patient P02"),
        ("P00,type2_diabetes,0", r"reference.csv:line 4: patient P00 has a second row"),
        ("P99,type2_diabetes,1", r"reference.csv:line 4: patient P99 is not in the extract"),
    ],
)
def test_bad_rows_are_named(tmp_path: Path, clinic: Path, row: str, message: str) -> None:
    reference = _reference(
        tmp_path,
        f"# coverage: reviewed\npatient_id,condition,status\nP00,type2_diabetes,yes\n{row}\n",
    )
    with pytest.raises(AscertainError, match=message):
        validate_study(DEMO_STUDY, reference, extract=clinic)


def test_unknown_declaration_is_named(tmp_path: Path, clinic: Path) -> None:
    reference = _reference(tmp_path, "# coverage: partial\npatient_id,condition,status\n")
    with pytest.raises(AscertainError, match=r"reference.csv:1: coverage must be one of"):
        validate_study(DEMO_STUDY, reference, extract=clinic)
    reference = _reference(
        tmp_path, "# coverage: complete\n# sampling: by_definition\npatient_id,condition,status\n"
    )
    with pytest.raises(AscertainError, match="a complete reference covers every patient"):
        validate_study(DEMO_STUDY, reference, extract=clinic)


def test_sampling_by_definition_status_is_corrected(tmp_path: Path, clinic: Path) -> None:
    # 5 of the 10 definition positives reviewed (4 TP, 1 FP) and 10 of the 30 negatives
    # (2 FN, 8 TN). By hand (Begg and Greenes 1983): weights 10/5 = 2 and 30/10 = 3, so
    # TP 8, FP 2, FN 6, TN 24: sensitivity 8 / 14, specificity 24 / 26.
    rows = ["P00,1", "P01,1", "P02,1", "P03,1", "P04,0", "P10,1", "P11,1"]
    rows += [f"P{i},0" for i in range(12, 20)]
    reference = _reference(
        tmp_path,
        "# coverage: reviewed\n# sampling: by_definition\npatient_id,condition,status\n"
        + "".join(f"{r.replace(',', ',type2_diabetes,')}\n" for r in rows),
    )
    (result,) = validate_study(DEMO_STUDY, reference, extract=clinic)
    assert result.corrected is not None
    assert result.corrected.sensitivity.estimate == pytest.approx(8 / 14)
    assert result.corrected.specificity.estimate == pytest.approx(24 / 26)
    assert result.accuracy.sensitivity.estimate == pytest.approx(4 / 6)  # naive: biased up
    text = render_validation([result], 1)
    assert "sensitivity  0.571" in text
    assert "corrected for verification bias" in text
    assert "sampled by definition status from 10 definition positives and 30 negatives" in text
    assert "kappa        not shown" in text


def test_onsets_before_the_extract_are_not_compared(tmp_path: Path, clinic: Path) -> None:
    # Encounters start on 2012-06-01; the definition dates P00-P09 on 2014-03-01.
    rows = [f"P0{i},type2_diabetes,1,2011-01-01\n" for i in range(6)]  # before the extract
    rows += [f"P0{i},type2_diabetes,1,2014-02-01\n" for i in range(6, 10)]  # 28 days earlier
    reference = _reference(
        tmp_path, "# coverage: reviewed\npatient_id,condition,status,date\n" + "".join(rows)
    )
    (result,) = validate_study(DEMO_STUDY, reference, extract=clinic)
    assert result.early == 6
    assert result.extract_start is not None
    assert str(result.extract_start) == "2012-06-01"
    assert (result.onsets.n, result.onsets.median_difference) == (4, 28)
    text = render_validation([result], 1)
    assert "6 reference onsets before the start of the extract (2012-06-01) not compared" in text
