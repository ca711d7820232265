"""Study designs on hand-made extracts whose expected tables were computed by hand.

tests/fixtures/designs/README.md lists the cases; each folder's README explains every patient.
"""

from __future__ import annotations

import csv
import shutil
from pathlib import Path

import polars as pl
import pytest

from pipeline.workflows.build import BuildOptions, build_study

DESIGNS = Path(__file__).parent / "fixtures" / "designs"

CASES = [
    ("fixed_date", "study.yaml", ""),
    ("first_event", "study.yaml", ""),
    ("first_event", "study_condition.yaml", "_condition"),
    ("eligibility_steps", "study.yaml", ""),
    ("covariates", "study.yaml", ""),
    ("horizon_years", "study.yaml", ""),
    ("horizon_years", "study_3y.yaml", "_3y"),
    ("new_users", "study.yaml", ""),
]


def _text(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return f"{round(value, 4)}"
    return str(value)


def _read(path: Path) -> list[dict[str, str]]:
    with path.open(encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


@pytest.fixture(scope="module", params=CASES, ids=lambda c: f"{c[0]}/{c[1]}")
def built(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory):
    case, study, suffix = request.param
    folder = tmp_path_factory.mktemp(case) / case
    shutil.copytree(DESIGNS / case, folder)
    # the study files point at the repository's definitions through a relative path
    for path in folder.glob("study*.yaml"):
        text = path.read_text(encoding="utf-8")
        path.write_text(
            text.replace("../../../../definitions", str(DESIGNS.parents[2] / "definitions")),
            encoding="utf-8",
        )
    out = folder.parent / "result"  # beside the extract: an output inside it is refused
    build_study(folder / study, BuildOptions(out=out))
    return DESIGNS / case, suffix, out


def test_cohort_matches(built: tuple[Path, str, Path]) -> None:
    expected_dir, suffix, out = built
    expected = _read(expected_dir / f"expected_cohort{suffix}.csv")
    got = pl.read_parquet(out / "cohort.parquet")
    assert got["patient_id"].cast(pl.String).to_list() == [r["patient_id"] for r in expected]
    columns = list(expected[0])
    for row, want in zip(got.select(columns).iter_rows(named=True), expected, strict=True):
        assert {c: _text(v) for c, v in row.items()} == want


def test_attrition_matches(built: tuple[Path, str, Path]) -> None:
    expected_dir, suffix, out = built
    got = [
        {k: r[k] for k in ("step", "patients_before", "removed", "remaining")}
        for r in _read(out / "attrition.csv")
    ]
    assert got == _read(expected_dir / f"expected_attrition{suffix}.csv")
