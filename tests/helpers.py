"""Small builders shared by tests: tiny CSV extracts, ad-hoc studies, running one stage."""

from __future__ import annotations

import csv
import os
import shutil
from pathlib import Path
from typing import Any, NoReturn

import pytest

from pipeline.engine import DuckDBEngine
from pipeline.extract import discover_extract
from pipeline.workflows.build import plan_study

from .conftest import DEMO_STUDY, ROOT

COLUMNS = {
    "patients": ["patient_id", "birth_date", "sex", "death_date"],
    "encounters": ["patient_id", "encounter_date", "encounter_type"],
    "diagnoses": ["patient_id", "event_date", "code_system", "code", "source"],
    "prescriptions": ["patient_id", "start_date", "stop_date", "atc"],
    "measurements": ["patient_id", "obs_date", "measure", "value_text", "value", "unit"],
}


def write_extract(folder: Path, tables: dict[str, list[dict[str, Any]]]) -> Path:
    """Write each canonical table as CSV; tables not given are written empty."""
    folder.mkdir(parents=True, exist_ok=True)
    for name, columns in COLUMNS.items():
        with (folder / f"{name}.csv").open("w", encoding="utf-8", newline="") as handle:
            writer = csv.DictWriter(handle, fieldnames=columns)
            writer.writeheader()
            for row in tables.get(name, []):
                writer.writerow({c: row.get(c, "") for c in columns})
    return folder


STUDY_TEMPLATE = """\
study: test_study
title: a test study
extract: {extract}
definitions: {definitions}
end_of_data: 2019-12-31
index:
  first_encounter:
    between: [2015-01-01, 2016-12-31]
eligibility:
  - sex: [F, M]
  - alive_at_index: true
  - age:
      between: [40, 85]
  - history_days: 730
covariates: {covariates}
outcomes:
  conditions: [{outcomes}]
  horizon_days: 1461
followup:
  end_at: [death, end_of_data, lost_contact, horizon]
  lost_contact_after_days: 365
output:
  folder: {out}
"""


def write_study(
    folder: Path,
    conditions: dict[str, str],
    outcomes: list[str],
    *,
    extract: Path,
    covariates: str = "{}",
) -> Path:
    """Write condition files and a study using them; returns the study file."""
    definitions = folder / "conditions"
    definitions.mkdir(parents=True, exist_ok=True)
    for name, text in conditions.items():
        (definitions / f"{name}.yaml").write_text(text, encoding="utf-8")
    if any("../codelists/" in text for text in conditions.values()):
        # a shipped definition's text names the shipped code lists beside its folder
        shutil.copytree(ROOT / "definitions" / "codelists", folder / "codelists")
    study = folder / "study.yaml"
    study.write_text(
        STUDY_TEMPLATE.format(
            extract=extract,
            definitions=definitions,
            outcomes=", ".join(outcomes),
            covariates=covariates,
            out=folder / "out",
        ),
        encoding="utf-8",
    )
    return study


def run_stage(
    extract: Path, stage: str, *, study: Path = DEMO_STUDY, order: tuple[str, ...] = ("patient_id",)
) -> list[dict[str, Any]]:
    """Run the part of a study's plan that computes ``stage`` and return its rows."""
    plan = plan_study(study).through(stage, order=order)
    result = DuckDBEngine(threads=1).run(plan, discover_extract(extract, plan.sources))
    return result.outputs[stage].to_pylist()


def eligible_patient(patient_id: str, sex: str = "F", birth_date: str = "1955-06-15") -> dict:
    """A patient row that passes the demo eligibility steps with :func:`eligible_encounters`."""
    return {"patient_id": patient_id, "birth_date": birth_date, "sex": sex, "death_date": ""}


def eligible_encounters(patient_id: str) -> list[dict]:
    """Encounters giving index 2015-03-02 with more than 730 days of history."""
    return [
        {"patient_id": patient_id, "encounter_date": d, "encounter_type": "visit"}
        for d in (
            "2012-01-10",
            "2015-03-02",
            "2016-03-01",
            "2017-03-01",
            "2018-03-01",
            "2019-03-01",
        )
    ]


def demo_study_variant(
    folder: Path, *, output: str = "", quality: str = "", persontime: str = ""
) -> Path:
    """A copy of the demo study, with its definitions, plus settings a test needs.

    ``output`` is inserted as the first lines of the ``output:`` section (e.g.
    ``"allow_empty_cohort: true"``); ``quality`` and ``persontime`` become the study's
    ``quality:`` and ``persontime:`` sections, written as YAML flow mappings (e.g.
    ``"{max_share_set_aside: 1}"``, ``"{age_bands: [40, 50, 60, 70, 80]}"``).
    """
    shutil.copytree(ROOT / "definitions" / "conditions", folder / "conditions")
    shutil.copytree(ROOT / "definitions" / "codelists", folder / "codelists")
    (folder / "studies").mkdir()
    text = DEMO_STUDY.read_text(encoding="utf-8")
    text = text.replace(
        "extract: ../../synthetic_extract", f"extract: {ROOT / 'synthetic_extract'}"
    )
    if output:
        assert "\noutput:\n" in text
        text = text.replace("\noutput:\n", f"\noutput:\n  {output}\n")
    if quality:
        assert "\nquality:" not in text
        text += f"\nquality: {quality}\n"
    if persontime:
        assert "\npersontime:" not in text
        text += f"\npersontime: {persontime}\n"
    study = folder / "studies" / DEMO_STUDY.name
    study.write_text(text, encoding="utf-8")
    return study


def in_ci() -> bool:
    """Whether the tests run in CI, where every test dependency must be present (``CI=true``)."""
    return os.environ.get("CI", "").strip().lower() == "true"


def require(found: object, reason: str) -> None:
    """Skip the calling test when a tool it needs is missing; in CI, fail it instead.

    Locally a missing PostgreSQL, Java or Chromium should not stop anyone from running the
    rest of the suite, so the test skips with the reason. In CI (``CI=true``) a skip would
    hide that a whole engine or the report's browser check never ran, so it fails.

    Args:
        found: what was found (a path from ``shutil.which``, a module spec, a bool); falsy
            means missing.
        reason: what is missing and how to install it, shown in the skip or failure.
    """
    if found:
        return
    _missing(reason)


def _missing(reason: str) -> NoReturn:
    if in_ci():
        pytest.fail(f"{reason} (CI=true: a missing test dependency fails)", pytrace=False)
    pytest.skip(reason)
