"""``ascertain explain`` on hand-picked patients of the hand-made fixtures.

Expectations come from the fixtures' README files (hand-computed), not from a build.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.workflows.explain import explain_patient

from .conftest import DEMO_STUDY, HANDMADE

MEASURES = HANDMADE.parent / "handmade_measures"


def _trace(patient: str, extract: Path = HANDMADE) -> dict:
    return explain_patient(DEMO_STUDY, patient, extract=extract)


def _failed_step(trace: dict) -> str | None:
    return next((s["step"] for s in trace["eligibility"] if "step" in s and not s["passed"]), None)


@pytest.mark.parametrize(
    ("patient", "index_date", "failed"),
    [
        ("HM-005", "2016-03-10", "age"),  # 40th birthday the day after index
        ("HM-018", "2015-04-14", "alive_at_index"),  # death on the index day
        ("HM-002", "2016-12-31", None),  # index on the last day of the window
    ],
)
def test_eligibility_steps(patient: str, index_date: str, failed: str | None) -> None:
    trace = _trace(patient)
    assert trace["index_date"] == index_date
    assert _failed_step(trace) == failed
    assert trace["in_cohort"] is (failed is None)


@pytest.mark.parametrize("patient", ["HM-003", "HM-019"])
def test_not_in_source_population(patient: str) -> None:
    trace = _trace(patient)
    assert trace["in_patients_table"]
    assert not trace["in_source_population"]
    assert trace["index_date"] is None


def test_orphan_patient() -> None:
    trace = _trace("HM-999")
    assert not trace["in_patients_table"]
    assert (
        "not in the patients table"
        in CliRunner()
        .invoke(
            app, ["explain", str(DEMO_STUDY), "--patient", "HM-999", "--extract", str(HANDMADE)]
        )
        .output
    )


def test_follow_up_end_of_data() -> None:
    # HM-002: index 2016-12-31, end of data 2019-12-31 comes first: 1095 days
    assert _trace("HM-002")["followup"] == {
        "end": "2019-12-31",
        "days": 1095,
        "reason": "end_of_data",
    }


def test_code_and_drug_rule_with_its_events() -> None:
    # HX-003: furosemide 2014-11-15 and I50.9 2015-08-20, 278 days apart -> rule (b) met on the
    # later date, incident 107 days after index 2015-05-05.
    outcome = _trace("HX-003", MEASURES)["outcomes"]["heart_failure"]
    events = {(e["date"], e["evidence"], e["raw_code"]) for e in outcome["evidence"]}
    assert ("2014-11-15", "loop_diuretic", "C03CA01") in events
    assert ("2015-08-20", "hf_code", "I50.9") in events
    assert outcome["rules_met"] == [{"rule": "code and loop diuretic", "met_on": "2015-08-20"}]
    assert (outcome["onset"], outcome["incident"], outcome["days_to"]) == ("2015-08-20", True, 107)


def test_derived_egfr_is_shown() -> None:
    # HX-024: creatinine 1.04 mg/dL, woman aged 63: CKD-EPI 2021 gives 60.39, not below 60.
    outcome = _trace("HX-024", MEASURES)["outcomes"]["ckd"]
    derived = [m for m in outcome["measurements"] if m["raw"] == "derived"]
    assert [m["date"] for m in derived] == ["2016-02-01", "2016-06-01"]
    assert all(m["value"] == pytest.approx(60.39, abs=0.01) for m in derived)
    assert outcome["rules_met"] == []
    assert outcome["onset"] is None


def test_text_and_json_formats() -> None:
    runner = CliRunner()
    args = ["explain", str(DEMO_STUDY), "--patient", "HM-005", "--extract", str(HANDMADE)]
    text = runner.invoke(app, args).output
    assert "step 3 age: FAIL (age at index between 40 and 85 years)" in text
    assert "excluded at this step" in text
    data = json.loads(runner.invoke(app, [*args, "--format", "json"]).output)
    assert data["patient_id"] == "HM-005"
    assert _failed_step(data) == "age"
    bad = runner.invoke(app, [*args, "--format", "xml"])
    assert bad.exit_code == 2


@pytest.mark.parametrize(
    ("patient", "rule", "met_on", "incident"),
    [
        # HM-024: E119 2016-01-10 and 250.00 2018-01-09, exactly 730 days apart (fixture README)
        ("HM-024", "two diabetes codes", "2018-01-09", True),
        # HX-017: eGFR 52 on 2015-09-01 and 48 on 2016-03-01, 182 days apart (fixture README)
        ("HX-017", "two low eGFR at least 90 days apart", "2016-03-01", True),
    ],
)
def test_rule_met_dates(patient: str, rule: str, met_on: str, incident: bool) -> None:
    extract = HANDMADE if patient.startswith("HM") else MEASURES
    trace = _trace(patient, extract)
    outcome = "type2_diabetes" if "diabetes" in rule else "ckd"
    met = {r["rule"]: r["met_on"] for r in trace["outcomes"][outcome]["rules_met"]}
    assert met[rule] == met_on
    assert trace["outcomes"][outcome]["incident"] is incident


def test_two_codes_731_days_apart_meet_no_rule() -> None:
    # HM-025: second code 731 days after the first: no rule met, no onset (fixture README)
    outcome = _trace("HM-025")["outcomes"]["type2_diabetes"]
    assert outcome["rules_met"] == []
    assert outcome["onset"] is None
    assert len([e for e in outcome["evidence"] if e["evidence"] == "dm_code"]) == 2


def test_an_exact_duplicate_row_is_traced_once(tmp_path: Path) -> None:
    # The demo study checks exact duplicates: a copied E119 row of HM-024 counts once, in the
    # rules and in the trace.
    extract = tmp_path / "extract"
    shutil.copytree(HANDMADE, extract)
    with (extract / "diagnoses.csv").open("a", encoding="utf-8") as handle:
        handle.write("HM-024,2016-01-10,ICD10,E119,problem_list\n")
    outcome = _trace("HM-024", extract)["outcomes"]["type2_diabetes"]
    assert [e["date"] for e in outcome["evidence"] if e["evidence"] == "dm_code"] == [
        "2016-01-10",
        "2018-01-09",
    ]
