"""``measurement_values`` keeps the usable values some later stage can read, and only those.

Rows are judged the same either way; what a study can never read (a blood pressure years before
any possible index date) is not stored. The end-to-end tests show the cohorts do not change;
these show which rows are kept, on a hand-made extract, for the demo study and variants of it.
The demo's index falls between 2015-01-01 and 2016-12-31 and its measure covariates look back
730 days, so a covariate reaches 2013-01-01 to 2016-12-31 at most.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pytest

from .conftest import DEMO_STUDY
from .helpers import eligible_encounters, eligible_patient, run_stage, write_extract

DEMO_TEXT = DEMO_STUDY.read_text(encoding="utf-8")

# (measure, date, value, unit)
ROWS = [
    ("sbp", "2012-12-31", "130", "mmHg"),  # a day before any covariate window can reach
    ("sbp", "2013-01-01", "131", "mmHg"),  # the first day one can
    ("sbp", "2016-12-31", "132", "mmHg"),  # the last possible index date
    ("sbp", "2017-01-01", "133", "mmHg"),  # after every possible index date
    ("dbp", "2015-06-01", "80", "mmHg"),  # no stage reads it
    ("hba1c", "2018-06-01", "7.0", "%"),  # evidence of type 2 diabetes: any date
    ("hba1c", "2018-06-01", "5.5", "%"),  # neither evidence nor near an index date
    ("hba1c", "2014-06-01", "5.5", "%"),  # near an index date
    ("egfr", "2018-06-01", "75", "mL/min/1.73m2"),  # derived too, and evidence: all kept
    ("creatinine", "2005-06-01", "1.0", "mg/dL"),  # eGFR is derived from it
    ("height", "2005-06-01", "170", "cm"),  # the latest height, whatever its date
    ("weight", "2010-06-01", "80", "kg"),  # BMI's same-day input, outside its window
    ("weight", "2014-06-01", "81", "kg"),
    ("bmi", "2010-06-01", "27", "kg/m2"),  # outside the BMI covariate's window
    ("bmi", "2014-07-01", "28", "kg/m2"),
]


@pytest.fixture(scope="module")
def extract(tmp_path_factory: pytest.TempPathFactory) -> Path:
    rows = [
        {"patient_id": "P1", "obs_date": d, "measure": m, "value": v, "unit": u}
        for m, d, v, u in ROWS
    ]
    return write_extract(
        tmp_path_factory.mktemp("kept") / "extract",
        {
            "patients": [eligible_patient("P1")],
            "encounters": eligible_encounters("P1"),
            "measurements": rows,
        },
    )


def _kept(extract: Path, study: Path) -> set[tuple[str, str, float]]:
    rows = run_stage(extract, "measurement_values", study=study, order=("measure", "obs_date"))
    return {(r["measure"], r["obs_date"].isoformat(), round(r["value"], 1)) for r in rows}


def test_the_demo_keeps_what_its_evidence_and_windows_can_read(extract: Path) -> None:
    assert _kept(extract, DEMO_STUDY) == {
        ("sbp", "2013-01-01", 131.0),
        ("sbp", "2016-12-31", 132.0),
        ("hba1c", "2018-06-01", 7.0),
        ("hba1c", "2014-06-01", 5.5),
        ("egfr", "2018-06-01", 75.0),
        ("creatinine", "2005-06-01", 1.0),
        ("height", "2005-06-01", 170.0),
        ("weight", "2014-06-01", 81.0),
        ("bmi", "2014-07-01", 28.0),
    }


def test_a_same_day_input_read_for_itself_keeps_the_derivation_whole(
    extract: Path, study_copy: Callable[[str], Path]
) -> None:
    text = DEMO_TEXT.replace(
        "  sbp: {latest: sbp, window: [-730, 0]}\n",
        "  sbp: {latest: sbp, window: [-730, 0]}\n  weight: {latest: weight, window: [-90, 0]}\n",
    )
    assert "weight: {latest" in text
    kept = _kept(extract, study_copy(text))
    assert ("weight", "2010-06-01", 80.0) in kept
    assert ("bmi", "2010-06-01", 27.0) in kept


def test_a_covariate_without_a_start_keeps_all_earlier_history(
    extract: Path, study_copy: Callable[[str], Path]
) -> None:
    text = DEMO_TEXT.replace(
        "sbp: {latest: sbp, window: [-730, 0]}", "sbp: {latest: sbp, window: [null, 0]}"
    )
    assert "window: [null, 0]" in text
    kept = {k for k in _kept(extract, study_copy(text)) if k[0] == "sbp"}
    assert kept == {
        ("sbp", "2012-12-31", 130.0),
        ("sbp", "2013-01-01", 131.0),
        ("sbp", "2016-12-31", 132.0),
    }


def test_a_derived_measure_that_is_evidence_keeps_it_and_its_inputs_whole(
    extract: Path, study_copy: Callable[[str], Path]
) -> None:
    text = DEMO_TEXT.replace(
        "  hypertension: {condition: hypertension}",
        "  hypertension: {condition: hypertension}\n  obese: {condition: obesity}",
    )
    assert "obese:" in text
    study = study_copy(text)
    (study.parents[1] / "conditions" / "obesity.yaml").write_text(
        "condition: obesity\n"
        "title: Obesity\n"
        "about: A test definition, one BMI of 30 or more.\n"
        "evidence:\n"
        "  bmi_high: {measurement: {measure: bmi, at_least: 30 kg/m2}}\n"
        "rules:\n"
        "  - {name: one high BMI, need: {bmi_high: 1}}\n",
        encoding="utf-8",
    )
    kept = _kept(extract, study)
    # a reported BMI under 30 still wins over a derived one on its day, so it is kept
    assert ("bmi", "2010-06-01", 27.0) in kept
    assert ("weight", "2010-06-01", 80.0) in kept
