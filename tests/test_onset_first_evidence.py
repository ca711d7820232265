"""``onset: first_evidence``: the earliest evidence of the sets of events that first met a rule.

The compiled rule and onset stages are compared with ``tests.oracle.first_evidence_onset``,
which enumerates the qualifying sets themselves, on random small histories; a hand-computed
case checks the example that motivated the definition (an inhaler years before the codes).
"""

from __future__ import annotations

from datetime import date, timedelta

import duckdb
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.compile._context import evidence_number
from pipeline.compile._rules import condition_stages
from pipeline.config import Condition
from tests.oracle import first_evidence_onset

EPOCH = date(1970, 1, 1)
D0 = date(2020, 1, 1)

Row = tuple[str, str, date, int]  # (patient_id, evidence key, date, n_rows)


def condition_with(rules: list[dict]) -> Condition:
    named = [{**rule, "name": f"r{i}"} for i, rule in enumerate(rules)]
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
            "rules": named,
            "onset": "first_evidence",
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


def sql_onsets(con: duckdb.DuckDBPyConnection, rules: list[dict], rows: list[Row]) -> dict:
    """Load ``rows``, run the compiled rule and onset stages, return patient -> onset."""
    rules_stage, onset_stage = condition_stages(condition_with(rules))
    con.execute("DELETE FROM evidence_events")
    if rows:
        values = ", ".join(["(?, ?, ?, ?, ?)"] * len(rows))
        params = [
            item
            for patient, key, day, n_rows in rows
            for item in (patient, evidence_number(key), day, (day - EPOCH).days, n_rows)
        ]
        con.execute(f"INSERT INTO evidence_events VALUES {values}", params)
    con.execute(f"CREATE OR REPLACE TABLE {rules_stage.name} AS {rules_stage.render('duckdb')}")
    result = con.execute(onset_stage.render("duckdb")).fetchall()
    assert len({patient for patient, _ in result}) == len(result)
    return dict(result)


KEYS = st.sampled_from(["c.a", "c.a", "c.b", "c.b", "c.x"])  # x: evidence no rule needs
OFFSETS = st.one_of(st.integers(0, 800), st.integers(0, 10), st.sampled_from([0, 90, 365, 366]))
HISTORY = st.lists(
    st.tuples(KEYS, OFFSETS, st.integers(1, 2)),
    max_size=5,
    unique_by=lambda event: (event[0], event[1]),
)


@st.composite
def small_rules(draw: st.DrawFn) -> dict:
    if draw(st.booleans()):
        need = draw(st.sampled_from([{"a": 2}, {"a": 1, "b": 1}]))
        apart = draw(st.sampled_from([0, 1, 90, 365]))
        within = draw(st.one_of(st.none(), st.integers(apart, 800)))
        return {"need": need, "apart_at_least_days": apart, "within_days": within}
    names = draw(st.sampled_from([["a"], ["b"], ["a", "b"]]))
    need = {name: draw(st.integers(1, 2)) for name in names}
    within = draw(st.one_of(st.sampled_from([0, 30, 365]), st.integers(0, 800)))
    return {"need": need, "distinct_days": draw(st.booleans()), "within_days": within}


@settings(max_examples=300, deadline=None)
@given(
    histories=st.lists(HISTORY, min_size=1, max_size=3),
    rules=st.lists(small_rules(), min_size=1, max_size=2),
)
def test_first_evidence_onset_matches_oracle(con, histories, rules):
    rows = [
        (f"p{i}", key, D0 + timedelta(days=offset), n_rows)
        for i, history in enumerate(histories)
        for key, offset, n_rows in history
    ]
    expected = {}
    for patient in sorted({row[0] for row in rows}):
        events = [(key, day, n) for p, key, day, n in rows if p == patient]
        onset = first_evidence_onset(events, [{"name": "r", **r} for r in rules], "c")
        if onset is not None:
            expected[patient] = onset
    assert sql_onsets(con, rules, rows) == expected


# Hand-computed (no oracle). Rules as in an asthma-like definition: two codes within 365 days,
# or a code and an inhaler within 365 days.
TWO_CODES = {"need": {"a": 2}, "distinct_days": True, "within_days": 365}
CODE_AND_INHALER = {"need": {"a": 1, "b": 1}, "within_days": 365}


def test_an_inhaler_years_before_the_codes_is_not_the_onset(con):
    rows = [
        ("p", "c.b", date(2012, 3, 1), 1),  # inhaler, years before
        ("p", "c.a", date(2016, 5, 10), 1),  # first code
        ("p", "c.a", date(2016, 9, 1), 1),  # second code: two codes met on 2016-09-01
    ]
    # The sets meeting a rule first (on 2016-09-01) are the two codes: the inhaler of 2012 is
    # 1,530+ days before and in no set, so the onset is the first code, 2016-05-10 (the old
    # definition, the earliest evidence of any kind, gave 2012-03-01).
    assert sql_onsets(con, [TWO_CODES, CODE_AND_INHALER], rows) == {"p": date(2016, 5, 10)}


def test_several_sets_on_the_first_day_give_the_earliest_of_all(con):
    rows = [
        ("p", "c.b", date(2016, 1, 20), 1),  # inhaler 225 days before the second code
        ("p", "c.a", date(2016, 6, 1), 1),
        ("p", "c.a", date(2016, 9, 1), 1),
    ]
    # On 2016-06-01 the code and the inhaler (133 days apart) meet CODE_AND_INHALER: the first
    # met date is 2016-06-01, and that set's earliest evidence is the inhaler, 2016-01-20.
    assert sql_onsets(con, [TWO_CODES, CODE_AND_INHALER], rows) == {"p": date(2016, 1, 20)}


def test_a_later_set_does_not_lend_its_evidence(con):
    pair = {"need": {"a": 1, "b": 1}, "apart_at_least_days": 90}
    rows = [
        ("p", "c.b", date(2016, 1, 1), 1),
        ("p", "c.a", date(2016, 4, 1), 1),  # 91 days after b: met on 2016-04-01, from 2016-01-01
        ("p", "c.a", date(2015, 12, 1), 1),  # a 31 days before b: no pair with it
        ("p", "c.b", date(2016, 4, 5), 1),  # pairs with the a of 2015-12-01 (126 days), later
    ]
    # a of 2015-12-01 pairs with b of 2016-01-01 only if 90+ days apart: 31 < 90. It does pair
    # with the b of 2016-04-05, but that pair ends 4 days after the first met date: the onset
    # is b's date of 2016-01-01, not the earlier a.
    assert sql_onsets(con, [pair], rows) == {"p": date(2016, 1, 1)}


def test_a_rule_met_later_does_not_lend_its_evidence(con):
    codes_30 = {"need": {"a": 2}, "distinct_days": True, "within_days": 30}
    inhaler = {"need": {"b": 1}, "within_days": 0}
    rows = [
        ("p", "c.a", date(2016, 1, 1), 1),
        ("p", "c.b", date(2016, 1, 5), 1),  # the inhaler rule is met first, on 2016-01-05
        ("p", "c.a", date(2016, 1, 11), 1),  # the two codes meet their rule 6 days later
    ]
    # Only the inhaler's set ends on the first met date: the onset is 2016-01-05, not the
    # first code of the later-met rule (2016-01-01).
    assert sql_onsets(con, [codes_30, inhaler], rows) == {"p": date(2016, 1, 5)}
