"""The hand-written query of benchmarks/outcome_only.sql gives the tool's cohort.

The overhead benchmark (benchmarks/outcome_only.py) compares the tool's build time with that
query's; the comparison means something only if both compute the same cohort. This test builds
the demo study without covariates on the committed synthetic extract and checks, patient by
patient, that the query gives the same patients, index dates, ends of follow-up and each
outcome's prevalent and incident flags and onset date.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import yaml
from sqlglot import exp

from pipeline import BuildOptions, build_study

from .conftest import DEMO_STUDY, ROOT

HAND_SQL = ROOT / "benchmarks" / "outcome_only.sql"
OUTCOMES = ("type2_diabetes", "ckd", "heart_failure")
COMPARED = [
    "patient_id",
    "index_date",
    "followup_end",
    *(f"{kind}_{o}" for o in OUTCOMES for kind in ("prevalent", "incident", "onset")),
]


def _outcome_only_cohort(tmp_path: Path) -> Path:
    doc = yaml.safe_load(DEMO_STUDY.read_text(encoding="utf-8"))
    for key in ("extract", "definitions"):
        doc[key] = str((DEMO_STUDY.parent / doc[key]).resolve())
    del doc["covariates"]
    study = tmp_path / "outcome_only.yaml"
    study.write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    out = tmp_path / "out"
    build_study(study, BuildOptions(out=out))
    return out / "cohort.parquet"


def test_hand_query_equals_the_tools_cohort(tmp_path: Path) -> None:
    cohort = _outcome_only_cohort(tmp_path)
    con = duckdb.connect()
    con.execute("SET file_search_path = ?", [str(ROOT / "synthetic_extract")])
    columns = ", ".join(COMPARED)
    query = HAND_SQL.read_text(encoding="utf-8")
    hand = con.execute(f"SELECT {columns} FROM ({query})").fetchall()
    file = exp.Literal.string(str(cohort)).sql("duckdb")
    tool = con.execute(f"SELECT {columns} FROM read_parquet({file}) ORDER BY patient_id").fetchall()
    assert len(tool) > 5000  # the demo cohort, not an empty comparison
    for outcome in OUTCOMES:  # every outcome has prevalent and incident cases
        prevalent = COMPARED.index(f"prevalent_{outcome}")
        assert sum(bool(r[prevalent]) for r in tool) > 20, outcome
        assert sum(bool(r[prevalent + 1]) for r in tool) > 20, outcome
    hand_rows = {r[0]: r for r in hand}
    tool_rows = {r[0]: r for r in tool}
    assert len(hand_rows) == len(hand)  # one row per patient
    differing = sorted(p for p in hand_rows.keys() | tool_rows.keys()
                       if hand_rows.get(p) != tool_rows.get(p))  # fmt: skip
    shown = [(hand_rows.get(p), tool_rows.get(p)) for p in differing[:3]]
    assert not differing, f"{len(differing)} patients differ (hand, tool): {shown}"
