"""The SQL of ``rule_query`` against a plain-Python oracle, and hand-written boundary cases."""

from __future__ import annotations

from datetime import date, timedelta

import duckdb
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.compile._context import evidence_number
from pipeline.compile._rules import rule_query
from pipeline.config import Condition
from tests.oracle import rule_onset, rule_onset_by_sets

EPOCH = date(1970, 1, 1)
D0 = date(2020, 1, 1)  # first date of every generated history

Row = tuple[str, str, date, int]  # (patient_id, evidence key, date, n_rows)


def condition_with(rule: dict) -> Condition:
    return Condition.model_validate(
        {
            "condition": "c",
            "title": "t",
            "about": "a",
            "evidence": {
                "a": {"diagnosis": {"ICD10": ["A00"]}},
                "b": {"prescription": {"atc": ["B01"]}},
                "x": {"diagnosis": {"ICD10": ["X00"]}},
            },
            "rules": [rule],
        }
    )


@pytest.fixture(scope="module")
def con():
    connection = duckdb.connect()
    connection.execute(
        "CREATE TABLE evidence_events("
        "patient_id VARCHAR, evidence INTEGER, event_date DATE, day INTEGER, n_rows INTEGER)"
    )
    yield connection
    connection.close()


def sql_onsets(con: duckdb.DuckDBPyConnection, rule: dict, rows: list[Row]) -> dict[str, date]:
    """Load ``rows`` as the whole table, run the compiled rule, return patient -> onset."""
    condition = condition_with(rule)
    sql = rule_query(condition, condition.rules[0]).sql(dialect="duckdb")
    con.execute("DELETE FROM evidence_events")
    if rows:
        values = ", ".join(["(?, ?, ?, ?, ?)"] * len(rows))
        params = [
            item
            for patient, key, day, n_rows in rows
            for item in (patient, evidence_number(key), day, (day - EPOCH).days, n_rows)
        ]
        con.execute(f"INSERT INTO evidence_events VALUES {values}", params)
    result = con.execute(sql).fetchall()
    patients = [patient for patient, _, _, _ in result]
    assert len(patients) == len(set(patients))  # at most one row per patient
    assert {(c, r) for _, c, r, _ in result} <= {("c", rule["name"])}
    return {patient: onset for patient, _, _, onset in result}


# ---------------------------------------------------------------------------------------------
# Strategies

KEYS = st.sampled_from(["c.a", "c.a", "c.a", "c.b", "c.b", "c.x", "d.a"])  # x, d.a: not needed
OFFSETS = st.one_of(
    st.integers(0, 1095),
    st.integers(0, 12),  # crowd some events together, often on the same day
    st.sampled_from([0, 1, 89, 90, 91, 365, 366, 730, 731]),
)
HISTORY = st.lists(
    st.tuples(KEYS, OFFSETS, st.integers(1, 3)),
    max_size=8,
    unique_by=lambda event: (event[0], event[1]),  # one row per (evidence, date)
)
PATIENTS = st.lists(HISTORY, min_size=1, max_size=4)
WITHIN = st.one_of(st.sampled_from([None, 0, 1, 7, 30, 365, 730]), st.integers(0, 800))


@st.composite
def within_rules(draw: st.DrawFn) -> dict:
    names = draw(st.sampled_from([["a"], ["b"], ["a", "b"]]))
    need = {name: draw(st.integers(1, 3)) for name in names}
    within = draw(WITHIN)
    if within is None and sum(need.values()) > 1:
        within = draw(st.integers(0, 800))  # the model requires a window then
    return {
        "name": "r",
        "need": need,
        "distinct_days": draw(st.booleans()),
        "within_days": within,
    }


@st.composite
def apart_rules(draw: st.DrawFn) -> dict:
    need = draw(st.sampled_from([{"a": 2}, {"a": 1, "b": 1}]))
    apart = draw(st.one_of(st.sampled_from([0, 1, 90]), st.integers(0, 800)))
    within = draw(
        st.one_of(st.none(), st.sampled_from([apart, apart + 1, 730]), st.integers(0, 800))
    )
    if within is not None and within < apart:
        within = None  # the model rejects apart > within
    return {
        "name": "r",
        "need": need,
        "distinct_days": draw(st.booleans()),
        "within_days": within,
        "apart_at_least_days": apart,
    }


ABSENT_END = st.one_of(st.none(), st.sampled_from([-30, -1, 0, 1, 30, 365]), st.integers(-400, 400))


@st.composite
def absent_rules(draw: st.DrawFn) -> dict:
    """A within or apart rule that also lists ``x`` as absent, with or without a window."""
    rule = draw(st.one_of(within_rules(), apart_rules()))
    window = draw(st.one_of(st.none(), st.tuples(ABSENT_END, ABSENT_END)))
    if window is not None and None not in window and window[0] > window[1]:
        window = (window[1], window[0])  # the model rejects a reversed window
    return {**rule, "absent": ["x"], "absent_window": window}


def to_rows(histories: list[list[tuple[str, int, int]]]) -> list[Row]:
    return [
        (f"p{i}", key, D0 + timedelta(days=offset), n_rows)
        for i, history in enumerate(histories)
        for key, offset, n_rows in history
    ]


def oracle_onsets(rows: list[Row], rule: dict) -> dict[str, date]:
    expected = {}
    for patient in sorted({row[0] for row in rows}):
        events = [(key, day, n_rows) for p, key, day, n_rows in rows if p == patient]
        onset = rule_onset(events, rule, "c")
        if onset is not None:
            expected[patient] = onset
    return expected


# ---------------------------------------------------------------------------------------------
# Property tests


@settings(max_examples=300, deadline=None)
@given(histories=PATIENTS, rule=within_rules())
def test_within_rules_match_oracle(con, histories, rule):
    rows = to_rows(histories)
    assert sql_onsets(con, rule, rows) == oracle_onsets(rows, rule)


@settings(max_examples=300, deadline=None)
@given(histories=PATIENTS, rule=apart_rules())
def test_apart_rules_match_oracle(con, histories, rule):
    rows = to_rows(histories)
    assert sql_onsets(con, rule, rows) == oracle_onsets(rows, rule)


@settings(max_examples=300, deadline=None)
@given(histories=PATIENTS, rule=absent_rules())
def test_absent_rules_match_oracle(con, histories, rule):
    rows = to_rows(histories)
    assert sql_onsets(con, rule, rows) == oracle_onsets(rows, rule)


@settings(max_examples=300, deadline=None)
@given(
    history=st.lists(
        st.tuples(KEYS, OFFSETS, st.integers(1, 3)),
        max_size=5,
        unique_by=lambda event: (event[0], event[1]),
    ),
    rule=within_rules(),
)
def test_oracle_scan_agrees_with_set_enumeration(history, rule):
    events = [(key, D0 + timedelta(days=offset), n_rows) for key, offset, n_rows in history]
    assert rule_onset(events, rule, "c") == rule_onset_by_sets(events, rule, "c")


# ---------------------------------------------------------------------------------------------
# Hand-written boundary cases (no oracle)

TWO_CODES = {"name": "r", "need": {"a": 2}, "distinct_days": True, "within_days": 730}
CODE_AND_DRUG = {"name": "r", "need": {"a": 1, "b": 1}, "within_days": 365}
EGFR_PAIR = {"name": "r", "need": {"a": 2}, "apart_at_least_days": 90}


def test_two_codes_730_days_apart_meet_a_730_day_window(con):
    rows = [("p", "c.a", D0, 1), ("p", "c.a", D0 + timedelta(days=730), 1)]
    # gap 730 <= 730: met on the second code's date
    assert sql_onsets(con, TWO_CODES, rows) == {"p": date(2021, 12, 31)}


def test_two_codes_731_days_apart_miss_a_730_day_window(con):
    rows = [("p", "c.a", D0, 1), ("p", "c.a", D0 + timedelta(days=731), 1)]
    # gap 731 > 730: never met
    assert sql_onsets(con, TWO_CODES, rows) == {}


def test_two_codes_on_the_same_day_are_not_distinct_days(con):
    rows = [("p", "c.a", D0, 2)]  # two rows, one date
    # distinct_days needs two dates
    assert sql_onsets(con, TWO_CODES, rows) == {}
    # without distinct_days the two rows are two events: met that day
    assert sql_onsets(con, {**TWO_CODES, "distinct_days": False}, rows) == {"p": D0}


def test_code_and_drug_365_days_apart_in_either_order(con):
    later = D0 + timedelta(days=365)  # 2020 is a leap year: 2020-12-31
    rows = [
        ("code_first", "c.a", D0, 1),
        ("code_first", "c.b", later, 1),
        ("drug_first", "c.b", D0, 1),
        ("drug_first", "c.a", later, 1),
    ]
    # gap 365 <= 365 both ways: met on the later date
    assert sql_onsets(con, CODE_AND_DRUG, rows) == {
        "code_first": date(2020, 12, 31),
        "drug_first": date(2020, 12, 31),
    }


def test_code_and_drug_366_days_apart_in_either_order(con):
    later = D0 + timedelta(days=366)
    rows = [
        ("code_first", "c.a", D0, 1),
        ("code_first", "c.b", later, 1),
        ("drug_first", "c.b", D0, 1),
        ("drug_first", "c.a", later, 1),
    ]
    # gap 366 > 365: neither is met
    assert sql_onsets(con, CODE_AND_DRUG, rows) == {}


def test_code_and_drug_on_the_same_day(con):
    rows = [("p", "c.a", D0, 1), ("p", "c.b", D0, 1)]
    # gap 0: met that day
    assert sql_onsets(con, CODE_AND_DRUG, rows) == {"p": D0}


def test_egfr_pair_89_days_apart_is_not_persistent(con):
    rows = [("p", "c.a", D0, 1), ("p", "c.a", D0 + timedelta(days=89), 1)]
    # gap 89 < 90: not met
    assert sql_onsets(con, EGFR_PAIR, rows) == {}


def test_egfr_pair_90_days_apart_is_persistent(con):
    rows = [("p", "c.a", D0, 1), ("p", "c.a", D0 + timedelta(days=90), 1)]
    # gap 90 >= 90: met on the second date, 2020-03-31
    assert sql_onsets(con, EGFR_PAIR, rows) == {"p": date(2020, 3, 31)}


def test_egfr_onset_is_the_earliest_later_date_of_a_pair(con):
    days = [0, 50, 100, 95]  # pairs >= 90 apart: (0, 100) and (0, 95); the earliest ends at 95
    rows = [("p", "c.a", D0 + timedelta(days=d), 1) for d in days]
    assert sql_onsets(con, EGFR_PAIR, rows) == {"p": date(2020, 4, 5)}


def test_apart_zero_needs_two_events(con):
    rule = {"name": "r", "need": {"a": 2}, "apart_at_least_days": 0}
    # one event is not a pair: not met
    assert sql_onsets(con, rule, [("p", "c.a", D0, 1)]) == {}
    # two rows on one day are two events 0 days apart: met that day
    assert sql_onsets(con, rule, [("p", "c.a", D0, 2)]) == {"p": D0}


def test_apart_zero_code_and_drug_on_one_day(con):
    rule = {"name": "r", "need": {"a": 1, "b": 1}, "apart_at_least_days": 0}
    # one code alone: not met; code and drug the same day: met that day
    assert sql_onsets(con, rule, [("p", "c.a", D0, 1)]) == {}
    assert sql_onsets(con, rule, [("p", "c.a", D0, 1), ("p", "c.b", D0, 1)]) == {"p": D0}


def test_three_of_a_kind_within_a_window(con):
    rule = {"name": "r", "need": {"a": 3}, "distinct_days": True, "within_days": 30}
    rows = [
        # span 30 <= 30: met on day 30 (2020-01-31)
        ("fits", "c.a", D0, 1),
        ("fits", "c.a", D0 + timedelta(days=10), 1),
        ("fits", "c.a", D0 + timedelta(days=30), 1),
        # span 31: not met
        ("too_wide", "c.a", D0, 1),
        ("too_wide", "c.a", D0 + timedelta(days=10), 1),
        ("too_wide", "c.a", D0 + timedelta(days=31), 1),
        # days 10, 31, 40 fit in 30 days: met on day 40 (2020-02-10)
        ("slides", "c.a", D0, 1),
        ("slides", "c.a", D0 + timedelta(days=10), 1),
        ("slides", "c.a", D0 + timedelta(days=31), 1),
        ("slides", "c.a", D0 + timedelta(days=40), 1),
        # three rows but only two dates: not met with distinct_days
        ("two_dates", "c.a", D0, 2),
        ("two_dates", "c.a", D0 + timedelta(days=5), 1),
    ]
    assert sql_onsets(con, rule, rows) == {
        "fits": date(2020, 1, 31),
        "slides": date(2020, 2, 10),
    }


def test_onset_is_the_later_date_of_the_earliest_qualifying_pair(con):
    rows = [
        ("p", "c.a", D0, 1),
        ("p", "c.a", D0 + timedelta(days=800), 1),  # 800 after the first: too far
        ("p", "c.a", D0 + timedelta(days=805), 1),  # 5 after the second: the first pair
    ]
    # 2020-01-01 + 805 days = 2022-03-16
    assert sql_onsets(con, TWO_CODES, rows) == {"p": date(2022, 3, 16)}


def test_other_evidence_and_conditions_do_not_count(con):
    rows = [
        ("p", "c.a", D0, 1),
        ("p", "c.x", D0 + timedelta(days=1), 1),  # evidence of c the rule does not need
        ("p", "d.a", D0 + timedelta(days=2), 1),  # same name, another condition
    ]
    # only one usable code: not met
    assert sql_onsets(con, TWO_CODES, rows) == {}


# The insulin-only pattern: a code and a drug within a year, and no "x" (say, a non-insulin
# drug) in a window around the date the rule is met.
NO_X_UNTIL_A_YEAR_AFTER = {**CODE_AND_DRUG, "absent": ["x"], "absent_window": (None, 365)}


def test_absent_window_ignores_evidence_after_its_end(con):
    t = D0 + timedelta(days=10)  # code on D0, drug on day 10: candidate onset 2020-01-11
    rows = [
        ("x_366_after", "c.a", D0, 1),
        ("x_366_after", "c.b", t, 1),
        ("x_366_after", "c.x", t + timedelta(days=366), 1),  # past the window's end
        ("x_365_after", "c.a", D0, 1),
        ("x_365_after", "c.b", t, 1),
        ("x_365_after", "c.x", t + timedelta(days=365), 1),  # on the window's last day
        ("x_long_before", "c.x", D0 - timedelta(days=1000), 1),  # null start: all history
        ("x_long_before", "c.a", D0, 1),
        ("x_long_before", "c.b", t, 1),
    ]
    assert sql_onsets(con, NO_X_UNTIL_A_YEAR_AFTER, rows) == {"x_366_after": date(2020, 1, 11)}
    # Without a window, the same x 366 days later rules the patient out for good.
    unbounded = {**NO_X_UNTIL_A_YEAR_AFTER, "absent_window": None}
    assert sql_onsets(con, unbounded, rows[:3]) == {}


def test_absent_window_lets_a_later_candidate_qualify(con):
    rule = {**CODE_AND_DRUG, "absent": ["x"], "absent_window": (-30, 30)}
    rows = [
        ("p", "c.a", D0, 1),
        ("p", "c.b", D0 + timedelta(days=1), 1),  # first candidate: day 1
        ("p", "c.x", D0 + timedelta(days=5), 1),  # 4 days after day 1: day 1 is ruled out
        ("p", "c.b", D0 + timedelta(days=100), 1),  # second candidate: day 100
    ]
    # Day 100 meets code (day 0) and drug within 365 days, and x is 95 days before it, outside
    # [-30, 30]: met on day 100, 2020-04-10.
    assert sql_onsets(con, rule, rows) == {"p": date(2020, 4, 10)}
    near = [*rows, ("p", "c.x", D0 + timedelta(days=80), 1)]  # 20 days before day 100
    assert sql_onsets(con, rule, near) == {}
