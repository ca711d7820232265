"""``ascertain validate`` on a tiny extract with a hand-written reference standard."""

from __future__ import annotations

from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline._validate import Validation, render_validation, validate_study, validation_cells
from pipeline.cli import app
from pipeline.errors import AscertainError
from pipeline.stats import diagnostic_accuracy, onset_agreement
from pipeline.stats._disclosure import feasible_range

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
        "ckd", diagnostic_accuracy(tp=tp, fp=fp, fn=fn, tn=tn), onset_agreement(differences)
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
