"""Follow-up and onset semantics on tiny hand-made extracts, every expectation computed by hand.

- a fixed-date index gets an ``in_contact_at_index`` step by default, and a build that would
  compute a negative follow-up fails naming the patient;
- ``followup.contact: any_activity`` measures loss of contact from any dated row;
- ``outcomes.clear_before`` makes a patient with evidence shortly before index not at risk;
- ``time_X`` / ``event_X`` on the same rows.
"""

from __future__ import annotations

import csv
import shutil
from pathlib import Path

import polars as pl
import pytest

from pipeline.config import load_study
from pipeline.errors import ConfigError, EngineError
from pipeline.workflows.build import BuildOptions, build_study

from .conftest import DEMO_STUDY
from .helpers import write_extract

# Our own definition for these tests (not a shipped one, which may change): two codes of E11
# on two days within 730 days.
DIABETES = """\
condition: diabetes
title: Diabetes (test)
about: two E11 codes within two years
evidence:
  code: {diagnosis: {ICD10: [E11]}}
rules:
  - {name: two codes, need: {code: 2}, distinct_days: true, within_days: 730}
"""

STUDY = """\
study: followup_semantics
title: follow-up semantics
extract: {extract}
definitions: {definitions}
end_of_data: 2019-12-31
index: {index}
eligibility: {eligibility}
outcomes:
  conditions: [diabetes]
  horizon_days: 1461
{clear}
followup:
  end_at: [death, end_of_data, lost_contact, horizon]
  lost_contact_after_days: 365
  contact: {contact}
output:
  folder: {out}
"""

FIXED = "{fixed_date: 2016-01-01}"
FIRST = "{first_encounter: {between: [2015-01-01, 2016-12-31]}}"


def _build(
    tmp_path: Path,
    tables: dict,
    *,
    index: str = FIXED,
    eligibility: str = "[]",
    clear: str = "",
    contact: str = "encounters",
) -> Path:
    extract = write_extract(tmp_path / "extract", tables)
    definitions = tmp_path / "conditions"
    definitions.mkdir(exist_ok=True)
    (definitions / "diabetes.yaml").write_text(DIABETES, encoding="utf-8")
    out = tmp_path / "out"
    study = tmp_path / "study.yaml"
    study.write_text(
        STUDY.format(
            extract=extract,
            definitions=definitions,
            index=index,
            eligibility=eligibility,
            clear=clear,
            contact=contact,
            out=out,
        ),
        encoding="utf-8",
    )
    build_study(study, BuildOptions(out=out))
    return out


def _attrition(out: Path) -> list[tuple[str, int, int]]:
    with (out / "attrition.csv").open(encoding="utf-8") as handle:
        rows = [(r["step"], int(r["removed"]), int(r["remaining"])) for r in csv.DictReader(handle)]
    # The first two lines count the extract and those without an index date (tested in
    # test_cli_messages.py); the steps from the source population on are what these tests read.
    assert [r[0] for r in rows[:2]] == ["patients_in_extract", "without_index_date"]
    return rows[2:]


def _patient(pid: str, **extra: str) -> dict:
    return {"patient_id": pid, "birth_date": "1960-01-01", "sex": "F", **extra}


# LONG_GONE was last seen on 2014-01-01, 730 days before the fixed index of 2016-01-01; his
# loss of contact is 2015-01-01, a year before index. RECENT was seen 100 days before index
# (2015-09-23) and on 2017-03-01 after it.
FIXED_TABLES = {
    "patients": [_patient("LONG_GONE"), _patient("RECENT")],
    "encounters": [
        {"patient_id": "LONG_GONE", "encounter_date": "2014-01-01"},
        {"patient_id": "RECENT", "encounter_date": "2015-09-23"},
        {"patient_id": "RECENT", "encounter_date": "2017-03-01"},
    ],
}


def test_fixed_date_studies_get_an_in_contact_step_by_default(tmp_path: Path) -> None:
    out = _build(tmp_path, FIXED_TABLES)
    # Default window [-365, 0]: 2015-01-01 .. 2016-01-01. LONG_GONE (2014-01-01) is out.
    assert _attrition(out) == [("source_population", 0, 2), ("in_contact_at_index", 1, 1)]
    with (out / "attrition.csv").open(encoding="utf-8") as handle:
        step = list(csv.DictReader(handle))[3]
    assert "added to fixed-date studies" in step["description"]
    cohort = pl.read_parquet(out / "cohort.parquet")
    # RECENT: last encounter 2017-03-01 -> lost contact 2018-03-01, 790 days after index.
    assert cohort.select("patient_id", "followup_end", "followup_days", "end_reason").rows() == [
        ("RECENT", pl.Series(["2018-03-01"]).str.to_date()[0], 790, "lost_contact")
    ]


def test_a_negative_followup_fails_the_build_naming_the_patient(tmp_path: Path) -> None:
    # The study widens the step to all history: LONG_GONE stays, with follow-up ending on
    # 2015-01-01, 365 days before index.
    with pytest.raises(EngineError, match=r"LONG_GONE, 2016-01-01, 2015-01-01, lost_contact"):
        _build(tmp_path, FIXED_TABLES, eligibility="[{in_contact_at_index: {window: [null, 0]}}]")
    assert not (tmp_path / "out").exists()  # nothing written


def test_a_first_encounter_study_gets_no_default_step(tmp_path: Path) -> None:
    out = _build(tmp_path, FIXED_TABLES, index=FIRST)
    # Only RECENT has an encounter in 2015-2016: index 2015-09-23, no contact step.
    assert _attrition(out) == [("source_population", 0, 1)]


# ACTIVE: last encounter 2016-01-01 (the index, a first encounter); a diagnosis (I10, a code
# no evidence matches) on 2016-06-01; a prescription on 2016-09-01. The study reads diagnoses
# (its definition does) but not prescriptions, so the prescription is no contact.
ACTIVE_TABLES = {
    "patients": [_patient("ACTIVE")],
    "encounters": [{"patient_id": "ACTIVE", "encounter_date": "2016-01-01"}],
    "diagnoses": [
        {"patient_id": "ACTIVE", "event_date": "2016-06-01", "code_system": "ICD10", "code": "I10"}
    ],
    "prescriptions": [{"patient_id": "ACTIVE", "start_date": "2016-09-01", "atc": "C09AA05"}],
}


@pytest.mark.parametrize(
    ("contact", "end", "days"),
    [
        # encounters: 2016-01-01 + 365 = 2016-12-31 (2016 is a leap year), 365 days
        ("encounters", "2016-12-31", 365),
        # any activity: the diagnosis of 2016-06-01 + 365 = 2017-06-01, 517 days
        ("any_activity", "2017-06-01", 517),
    ],
)
def test_what_counts_as_contact(tmp_path: Path, contact: str, end: str, days: int) -> None:
    out = _build(tmp_path, ACTIVE_TABLES, index=FIRST, contact=contact)
    row = pl.read_parquet(out / "cohort.parquet").row(0, named=True)
    assert (str(row["followup_end"]), row["followup_days"], row["end_reason"]) == (
        end,
        days,
        "lost_contact",
    )


# LATE: index 2016-01-01 (first encounter); E11 codes on 2015-08-01 (153 days, about five
# months, before index) and 2016-02-01 (31 days after): two codes within 730 days, met on
# 2016-02-01, after index. Seen again 2016-06-01 -> lost contact 2017-06-01.
# CLEAN: index 2016-01-01, codes 2016-03-01 and 2016-04-01: met 2016-04-01, day 91.
# DIED: index 2016-01-01, died 2017-01-01 with no diabetes.
LATE_TABLES = {
    "patients": [_patient("CLEAN"), _patient("DIED", death_date="2017-01-01"), _patient("LATE")],
    "encounters": [
        {"patient_id": p, "encounter_date": d}
        for p in ("CLEAN", "DIED", "LATE")
        for d in ("2016-01-01", "2016-06-01")
    ],
    "diagnoses": [
        {"patient_id": p, "event_date": d, "code_system": "ICD10", "code": "E11.9"}
        for p, d in [
            ("LATE", "2015-08-01"),
            ("LATE", "2016-02-01"),
            ("CLEAN", "2016-03-01"),
            ("CLEAN", "2016-04-01"),
        ]
    ],
}

OUTCOME = [
    "patient_id",
    "prevalent_diabetes",
    "at_risk_diabetes",
    "incident_diabetes",
    "days_to_diabetes",
    "time_diabetes",
    "event_diabetes",
    "followup_days",
    "end_reason",
]


def test_without_clear_before_a_code_five_months_before_index_counts_as_incident(
    tmp_path: Path,
) -> None:
    out = _build(tmp_path, LATE_TABLES, index=FIRST)
    rows = pl.read_parquet(out / "cohort.parquet").select(OUTCOME).rows()
    assert rows == [
        # CLEAN: incident on day 91; lost contact 2017-06-01 (517 days)
        ("CLEAN", False, True, True, 91, 91, 1, 517, "lost_contact"),
        # DIED: death 2017-01-01 (366 days) before lost contact 2017-06-01: competing event 2
        ("DIED", False, True, False, None, 366, 2, 366, "death"),
        # LATE: rule met 2016-02-01, day 31 after index: incident by the rule
        ("LATE", False, True, True, 31, 31, 1, 517, "lost_contact"),
    ]


def test_clear_before_makes_evidence_shortly_before_index_not_at_risk(tmp_path: Path) -> None:
    out = _build(tmp_path, LATE_TABLES, index=FIRST, clear="  clear_before: {diabetes: 365}")
    rows = pl.read_parquet(out / "cohort.parquet").select(OUTCOME).rows()
    assert rows == [
        ("CLEAN", False, True, True, 91, 91, 1, 517, "lost_contact"),
        ("DIED", False, True, False, None, 366, 2, 366, "death"),
        # LATE: a code 153 days before index (within 365): not at risk, all outcome columns empty
        ("LATE", False, False, None, None, None, None, 517, "lost_contact"),
    ]
    # 153 days before index is outside a 152-day window: LATE is at risk again
    out = _build(tmp_path / "b", LATE_TABLES, index=FIRST, clear="  clear_before: {diabetes: 152}")
    late = pl.read_parquet(out / "cohort.parquet").filter(pl.col("patient_id") == "LATE")
    assert late.select(OUTCOME).rows() == [
        ("LATE", False, True, True, 31, 31, 1, 517, "lost_contact")
    ]


def test_clear_before_counts_for_the_at_risk_of_any_outcome_step(tmp_path: Path) -> None:
    out = _build(
        tmp_path,
        LATE_TABLES,
        index=FIRST,
        eligibility="[{at_risk_of_any_outcome: true}]",
        clear="  clear_before: {diabetes: 365}",
    )
    assert _attrition(out) == [("source_population", 0, 3), ("at_risk_any_outcome", 1, 2)]


def _problems(tmp_path: Path, replace: tuple[str, str]) -> tuple[str, list[str]]:
    text = DEMO_STUDY.read_text(encoding="utf-8").replace(*replace)
    folder = tmp_path / "studies"
    folder.mkdir()
    shutil.copytree(DEMO_STUDY.parent.parent / "conditions", tmp_path / "conditions")
    path = folder / "study.yaml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError) as caught:
        load_study(path)
    return text, [str(p) for p in caught.value.problems]


def test_clear_before_must_name_an_outcome(tmp_path: Path) -> None:
    text, problems = _problems(
        tmp_path, ("  lookback: all\n", "  lookback: all\n  clear_before: {hypertension: 365}\n")
    )
    line = next(i for i, t in enumerate(text.splitlines(), 1) if t.startswith("outcomes:"))
    (problem,) = problems
    assert f"study.yaml:{line}:1 [bad-value] outcomes:" in problem
    assert problem.endswith("clear_before names non-outcomes: hypertension")


def test_contact_must_be_a_known_kind(tmp_path: Path) -> None:
    text, problems = _problems(
        tmp_path, ("  incomplete: censor\n", "  incomplete: censor\n  contact: phone_calls\n")
    )
    line = next(i for i, t in enumerate(text.splitlines(), 1) if "phone_calls" in t)
    (problem,) = problems
    assert f"study.yaml:{line}:" in problem
    assert "followup.contact" in problem


def test_one_contact_window_per_study(tmp_path: Path) -> None:
    step = "  - in_contact_at_index: {window: [-365, 0]}\n"
    _, problems = _problems(tmp_path, ("  - sex: [F, M]\n", f"{step}{step}  - sex: [F, M]\n"))
    assert any("in_contact_at_index is given twice" in p for p in problems), problems
