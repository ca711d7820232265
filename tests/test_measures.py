"""Measurements: unit conversions, derived measures and value parsing, checked on the engine.

External values come from the sources named beside each check (a publication, a reference
library, or "from memory").
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from pipeline.compile._context import evidence_number
from pipeline.config import shipped_measures
from pipeline.measures import parse_quantity

from .helpers import run_stage, write_extract, write_study

# (sex, age, creatinine mg/dL, eGFR) -- CKD-EPI 2021 (Inker et al., N Engl J Med 2021;385:1737),
# formula as published by the NKF; values cross-checked with an independent log form.
CKD_EPI_2021 = [
    ("F", 50, 0.8, 89.7),
    ("M", 60, 1.2, 69.2),
    ("M", 80, 2.0, 33.1),
    ("F", 40, 0.6, 116.3),
    ("M", 30, 0.9, 117.8),  # at the hinge, Scr = kappa
    ("F", 55, 0.9, 75.5),
    ("F", 70, 1.5, 37.3),
    ("M", 70, 4.0, 15.3),
]


def _measurement_rows(tmp_path: Path, rows: list[dict], patients: list[dict] | None = None):
    patients = patients or [{"patient_id": "P1", "birth_date": "1960-01-01", "sex": "F"}]
    extract = write_extract(tmp_path / "x", {"patients": patients, "measurements": rows})
    return run_stage(extract, "measurement_rows", order=("patient_id", "obs_date"))


def test_ckd_epi_2021_reference_values(tmp_path: Path) -> None:
    patients, rows = [], []
    for i, (sex, age, creatinine, _) in enumerate(CKD_EPI_2021):
        pid = f"P{i}"
        # born 2016-06-01 minus age years: exactly `age` on the measurement date 2016-06-01
        patients.append({"patient_id": pid, "birth_date": f"{2016 - age}-06-01", "sex": sex})
        rows.append(
            {
                "patient_id": pid,
                "obs_date": "2016-06-01",
                "measure": "creatinine",
                "value": str(creatinine),
                "unit": "mg/dL",
            }
        )
    extract = write_extract(tmp_path / "x", {"patients": patients, "measurements": rows})
    derived = {r["patient_id"]: r["value"] for r in run_stage(extract, "derived_egfr")}
    for i, (_, _, _, expected) in enumerate(CKD_EPI_2021):
        assert derived[f"P{i}"] == pytest.approx(expected, abs=0.05), CKD_EPI_2021[i]


def test_reported_egfr_wins_over_creatinine_that_day(tmp_path: Path) -> None:
    rows = [
        {
            "patient_id": "P1",
            "obs_date": "2016-06-01",
            "measure": "creatinine",
            "value": "2.0",
            "unit": "mg/dL",
        },
        {
            "patient_id": "P1",
            "obs_date": "2016-06-01",
            "measure": "egfr",
            "value": "75",
            "unit": "mL/min/1.73m2",
        },
        {
            "patient_id": "P1",
            "obs_date": "2016-07-01",
            "measure": "creatinine",
            "value": "2.0",
            "unit": "mg/dL",
        },
    ]
    extract = write_extract(
        tmp_path / "x",
        {
            "patients": [{"patient_id": "P1", "birth_date": "1950-01-01", "sex": "M"}],
            "measurements": rows,
        },
    )
    derived = run_stage(extract, "derived_egfr")
    assert [r["obs_date"].isoformat() for r in derived] == ["2016-07-01"]


@pytest.mark.parametrize(
    ("mmol_per_mol", "percent"),
    # NGSP = 0.09148 * IFCC + 2.152 (Hoelzel et al. 2004, Clin Chem 50:166; NGSP constants)
    [(48, 6.54), (53, 7.00), (42, 5.99)],
)
def test_hba1c_ifcc_to_ngsp(tmp_path: Path, mmol_per_mol: int, percent: float) -> None:
    rows = _measurement_rows(
        tmp_path,
        [
            {
                "patient_id": "P1",
                "obs_date": "2016-01-01",
                "measure": "hba1c",
                "value": str(mmol_per_mol),
                "unit": "mmol/mol",
            }
        ],
    )
    assert rows[0]["problem"] is None
    assert rows[0]["value"] == pytest.approx(percent, abs=0.01)


def test_hba1c_threshold_in_mmol_per_mol() -> None:
    # 48 mmol/mol is the ADA diagnostic threshold, 6.5 % (ADA Standards of Care, section 2);
    # by the master equation it is 6.543 %, so a threshold written in mmol/mol keeps its unit.
    assert shipped_measures().threshold(
        "hba1c", "at_least", "48 mmol/mol"
    ).canonical_value == pytest.approx(6.54304)


def test_creatinine_micromoles(tmp_path: Path) -> None:
    # 1 mg/dL = 88.42 umol/L (demo spec §4.2; molar mass 113.12 g/mol gives 88.402; KDIGO's 88.4)
    rows = _measurement_rows(
        tmp_path,
        [
            {
                "patient_id": "P1",
                "obs_date": "2016-01-01",
                "measure": "creatinine",
                "value": "176.84",
                "unit": "µmol/L",
            },
            {
                "patient_id": "P1",
                "obs_date": "2016-01-02",
                "measure": "creatinine",
                "value": "88.42",
                "unit": "umol/L",
            },
        ],
    )
    assert [r["value"] for r in rows] == [pytest.approx(2.0), pytest.approx(1.0)]


def test_glucose_mg_per_dl() -> None:
    # glucose molar mass 180.156 g/mol (IUPAC): 126 mg/dL = 6.994 mmol/L; 7.0 mmol/L = 126.11
    conversion = shipped_measures()["fasting_glucose"].conversion("mg/dL")
    assert conversion is not None
    assert conversion.to_canonical(126) == pytest.approx(6.994, abs=0.001)
    assert conversion.to_canonical(126.11) == pytest.approx(7.0, abs=0.001)


@pytest.mark.parametrize(
    ("weight", "height", "bmi"),
    # BMI = kg / m^2 (WHO TRS 894); 70 kg at 1.75 m is WHO's worked example of 22.9
    [("70", "175", 22.86), ("95", "170", 32.87)],
)
def test_bmi_derived_from_weight_and_latest_height(
    tmp_path: Path, weight: str, height: str, bmi: float
) -> None:
    rows = [
        {
            "patient_id": "P1",
            "obs_date": "2014-01-01",
            "measure": "height",
            "value": "160",
            "unit": "cm",
        },
        {
            "patient_id": "P1",
            "obs_date": "2018-01-01",
            "measure": "height",
            "value": height,
            "unit": "cm",
        },  # the latest height ever recorded is used, even after the weight
        {
            "patient_id": "P1",
            "obs_date": "2016-01-01",
            "measure": "weight",
            "value": weight,
            "unit": "kg",
        },
    ]
    study_dir = tmp_path / "s"
    extract = write_extract(
        tmp_path / "x",
        {
            "patients": [{"patient_id": "P1", "birth_date": "1960-01-01", "sex": "F"}],
            "measurements": rows,
        },
    )
    study = write_study(
        study_dir,
        {"obese": OBESE},
        ["obese"],
        extract=extract,
    )
    derived = run_stage(extract, "derived_bmi", study=study)
    assert [r["value"] for r in derived] == [pytest.approx(bmi, abs=0.005)]


OBESE = """\
condition: obese
title: Obese
about: test definition
evidence:
  bmi_high: {measurement: {measure: bmi, at_least: 30 kg/m2}}
rules:
  - {name: one high BMI, need: {bmi_high: 1}}
"""


@pytest.mark.parametrize(
    ("value", "value_text", "unit", "expected"),
    [
        ("", "6.5", "%", (6.5, None, None)),
        ("", "6,5", "%", (6.5, None, None)),  # decimal comma
        ("", "<5", "%", (5.0, "<", None)),
        ("", ">15", "%", (15.0, ">", None)),
        ("", "6.5 %", "", (6.5, None, None)),  # the unit written in the text
        ("", "6.5 %", "%", (6.5, None, None)),
        ("5.0", "7.1", "%", (5.0, None, None)),  # value wins over value_text
        ("", "", "%", (None, None, "no value")),
        ("", "1,234", "%", (None, None, "value not numeric")),  # thousands or decimals?
        ("", "high", "%", (None, None, "value not numeric")),
        ("abc", "", "%", (None, None, "value not numeric")),
        ("", "48 mmol/mol", "%", (None, None, "unit differs from value_text")),
        ("6.5", "", "mg", (None, None, "unit not convertible")),
        ("6.5", "", "", (None, None, "unit not convertible")),
        ("25", "", "%", (None, None, "implausible value")),
        ("3", "", "%", (3.0, None, None)),  # plausibility ranges include their ends
        ("20", "", "%", (20.0, None, None)),
    ],
)
def test_value_forms(
    tmp_path: Path, value: str, value_text: str, unit: str, expected: tuple
) -> None:
    (row,) = _measurement_rows(
        tmp_path,
        [
            {
                "patient_id": "P1",
                "obs_date": "2016-01-01",
                "measure": "hba1c",
                "value": value,
                "value_text": value_text,
                "unit": unit,
            }
        ],
    )
    want_value, want_qualifier, want_problem = expected
    assert row["problem"] == want_problem
    if want_problem is None:
        assert row["value"] == pytest.approx(want_value)
        assert row["qualifier"] == want_qualifier


def test_rows_that_cannot_be_used_say_why(tmp_path: Path) -> None:
    rows = _measurement_rows(
        tmp_path,
        [
            {"patient_id": "P9", "obs_date": "2016-01-01", "measure": "hba1c", "value": "6"},
            {"patient_id": "P1", "obs_date": "2016-13-01", "measure": "hba1c", "value": "6"},
            {
                "patient_id": "P1",
                "obs_date": "2020-01-01",
                "measure": "hba1c",
                "value": "6",
                "unit": "%",
            },
            {
                "patient_id": "P1",
                "obs_date": "2016-01-03",
                "measure": "cholesterol_hdl",
                "value": "1.2",
                "unit": "mmol/L",
            },
            {
                "patient_id": "P1",
                "obs_date": "2016-01-04",
                "measure": "Smoking",
                "value_text": "Current",
            },
            {
                "patient_id": "P1",
                "obs_date": "2016-01-05",
                "measure": "smoking",
                "value_text": "sometimes",
            },
        ],
    )
    problems = {
        (r["patient_id"], r["obs_date"] and r["obs_date"].isoformat()): r["problem"] for r in rows
    }
    assert problems == {
        ("P9", "2016-01-01"): "orphan patient",
        ("P1", None): "unparseable date",
        ("P1", "2020-01-01"): "after end of data",
        ("P1", "2016-01-03"): "unknown measure",
        ("P1", "2016-01-04"): None,
        ("P1", "2016-01-05"): "category not recognised",
    }
    (smoking,) = [r for r in rows if r["measure"] == "smoking" and r["problem"] is None]
    assert smoking["category"] == "current"


def test_parse_quantity() -> None:
    assert parse_quantity("60 mL/min/1.73m2") == (60.0, "mL/min/1.73m2")
    assert parse_quantity(" 6.5% ") == (6.5, "%")
    with pytest.raises(ValueError, match="is not a number followed by a unit"):
        parse_quantity("high")


@pytest.mark.parametrize(
    ("measure", "text", "message"),
    [
        (
            "egfr",
            "60 mmol/mol",
            "unit 'mmol/mol' cannot be converted for egfr; accepted: mL/min/1.73m2, "
            "mL/min/1.73 m2, mL/min/{1.73_m2}, ml/min/1.73m2, mL/min/1.73m²",
        ),
        ("hba1c", "6.5", "the threshold 6.5 needs a unit, e.g. '6.5 %'"),
        (
            "hba1c",
            "6.5 mg/dL",
            "unit 'mg/dL' cannot be converted for hba1c; accepted: %, % Hb, %{HbA1c}, mmol/mol",
        ),
        ("glucose", "7 mmol/L", "unknown measure 'glucose'; known: "),
    ],
)
def test_threshold_errors(measure: str, text: str, message: str) -> None:
    with pytest.raises(ValueError, match="^" + re.escape(message)):
        shipped_measures().threshold(measure, "at_least", text)


@pytest.mark.parametrize(
    ("egfr", "low"),
    # KDIGO 2012 GFR categories (Kidney Int Suppl 2013;3): G2 is 60-89, G3a 45-59, so 60 is
    # not stage 3 and 59.9 is; the ckd definition's "below 60" must split them the same way.
    [("60", False), ("59.9", True), ("45", True), ("89.9", False)],
)
def test_egfr_low_follows_the_kdigo_g3a_boundary(tmp_path: Path, egfr: str, low: bool) -> None:
    extract = write_extract(
        tmp_path / "x",
        {
            "patients": [{"patient_id": "P1", "birth_date": "1950-01-01", "sex": "F"}],
            "measurements": [
                {
                    "patient_id": "P1",
                    "obs_date": "2016-01-01",
                    "measure": "egfr",
                    "value": egfr,
                    "unit": "mL/min/1.73m2",
                }
            ],
        },
    )
    events = run_stage(extract, "evidence_events", order=("evidence",))
    assert any(e["evidence"] == evidence_number("ckd.egfr_low") for e in events) is low


def test_every_smoking_category_is_recognised(tmp_path: Path) -> None:
    rows = _measurement_rows(
        tmp_path,
        [
            {
                "patient_id": "P1",
                "obs_date": f"2016-01-0{i}",
                "measure": "smoking",
                "value_text": text,
            }
            for i, text in enumerate(("Current", "former", " NEVER ", "sometimes"), start=1)
        ],
    )
    assert [(r["category"], r["problem"]) for r in rows] == [
        ("current", None),
        ("former", None),
        ("never", None),
        ("sometimes", "category not recognised"),
    ]
