"""The compiler's shape: one row judgement per table, one spelling of each name, passes.

These check the contract of issue 17 part C on the demo plan: the usable-row rule and the
quality log's reasons live in the row-judgement stages only; the analysis table's outcome
columns are the ones ``names.outcome_columns`` lists; each stage is built once.
"""

from __future__ import annotations

import pytest
from sqlglot import exp

from pipeline import plan_study
from pipeline.compile import _cohort, compile_study, names
from pipeline.config import load_study

from .conftest import DEMO_STUDY

_JUDGED = {names.judged_stage(t) for t in ("encounters", "diagnoses", "prescriptions")}


def _literals(stage_query: exp.Expression) -> set[str]:
    return {lit.this for lit in stage_query.find_all(exp.Literal) if lit.is_string}


def test_timing_and_patient_reasons_are_written_only_in_the_judgements() -> None:
    plan = plan_study(DEMO_STUDY)
    for reason in ("orphan patient", "after end of data", "after death"):
        writing = {s.name for s in plan.stages if reason in _literals(s.query)}
        # measurement_rows judges each distinct measurement, measurements_judged each row, and
        # measurement_values its usable rows; the quality log applies the judgements' own
        # expressions to the rows with copies (checked below and in the next test).
        measurements = {names.MEASUREMENT_ROWS, names.MEASUREMENTS_JUDGED, names.MEASUREMENT_VALUES}
        assert writing == {*_JUDGED, *measurements, names.QUALITY_LOG}, reason


def test_every_measurement_reader_applies_the_same_row_judgement() -> None:
    # The record and timing parts of a measurement row's judgement are one pair of
    # expressions (compile/_judged.py); every stage that judges measurement rows states them
    # identically, so the values, contact and the quality log cannot disagree on a row.
    plan = plan_study(DEMO_STUDY)

    def parts(name: str) -> set[str]:
        return {
            case.sql("duckdb")
            for case in plan.stage(name).query.find_all(exp.Case)
            if {"orphan patient", "after death"} & _literals(case)
        }

    judgement = parts(names.MEASUREMENT_ROWS)
    assert len(judgement) == 2
    for name in (names.MEASUREMENTS_JUDGED, names.MEASUREMENT_VALUES):
        assert parts(name) == judgement, name
    # The log also judges the other tables' rows (their date is row_date).
    assert judgement <= parts(names.QUALITY_LOG)


def test_usable_rows_and_the_quality_log_read_the_same_judgements() -> None:
    plan = plan_study(DEMO_STUDY)
    assert plan.stage(names.PATIENT_BASE).depends_on == (names.judged_stage("patients"),)
    assert plan.stage(names.ENCOUNTER_ROWS).depends_on == (names.judged_stage("encounters"),)
    assert set(plan.stage(names.CODED_ROWS).depends_on) == _JUDGED - {"encounters_judged"}
    # The demo checks exact duplicates: the log judges each table's distinct rows with the
    # judgement of the row views (the same expressions), after grouping the raw columns, which
    # costs less than grouping judged rows (issue 24); measurements are read judged.
    log = plan.stage(names.QUALITY_LOG)
    assert names.MEASUREMENTS_JUDGED in log.depends_on
    for table in ("patients", "encounters", "diagnoses", "prescriptions"):
        view = plan.stage(names.judged_stage(table)).query
        judgement = {e.sql("duckdb") for e in view.find_all(exp.Case, exp.Coalesce)}
        assert judgement, table
        in_log = {e.sql("duckdb") for e in log.query.find_all(exp.Case, exp.Coalesce)}
        assert judgement <= in_log, table
    # Neither side restates the rule: the usable rows filter on the judgement's reason.
    for name in (names.PATIENT_BASE, names.ENCOUNTER_ROWS, names.CODED_ROWS):
        assert names.USED in _literals(plan.stage(name).query), name
        assert "after death" not in _literals(plan.stage(name).query), name


def test_the_cohort_writes_the_outcome_columns_names_lists() -> None:
    loaded = load_study(DEMO_STUDY)
    cohort = compile_study(loaded).stage(names.COHORT).query
    written = [e.alias_or_name for e in cohort.selects]
    for outcome in loaded.study.outcomes.conditions:
        expected = list(names.outcome_columns(outcome).all())
        start = written.index(expected[0])
        assert written[start : start + len(expected)] == expected


def test_window_counts_is_built_once(monkeypatch: pytest.MonkeyPatch) -> None:
    calls: list[str] = []
    original = _cohort.window_counts_stage

    def counting(ctx: object) -> object:
        calls.append("window_counts")
        return original(ctx)  # type: ignore[arg-type]

    monkeypatch.setattr(_cohort, "window_counts_stage", counting)
    plan = compile_study(load_study(DEMO_STUDY))
    assert calls == ["window_counts"]
    assert names.WINDOW_COUNTS in plan.stage(names.ELIGIBILITY).depends_on
