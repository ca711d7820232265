"""``near_index``: a fixed-date filter that must keep every row a window can reach.

Stages drop rows with it before joining them to the index dates, so a row it dropped that a
window could reach would silently change a covariate. Checked against the plain definition
(offset = day - index, inside the window) for index dates anywhere in the possible range.
"""

from __future__ import annotations

from datetime import date, timedelta

import duckdb
from hypothesis import given, settings
from hypothesis import strategies as st
from sqlglot import exp

from pipeline.compile._sql import near_index, value

FIRST, LAST = date(2015, 1, 1), date(2016, 12, 31)


def _kept(day: date, window: tuple[int | None, int]) -> bool:
    predicate = near_index(value(day), (FIRST, LAST), window)
    sql = exp.select(predicate).sql("duckdb")
    return bool(duckdb.sql(sql).fetchall()[0][0])


def _reachable(day: date, index: date, window: tuple[int | None, int]) -> bool:
    start, end = window
    offset = (day - index).days
    return offset <= end and (start is None or offset >= start)


windows = st.tuples(st.one_of(st.none(), st.integers(-3000, 0)), st.integers(-400, 0)).filter(
    lambda w: w[0] is None or w[0] <= w[1]
)


@settings(max_examples=200, deadline=None)
@given(
    index_offset=st.integers(0, (LAST - FIRST).days),
    day_offset=st.integers(-4000, 1000),
    window=windows,
)
def test_a_row_any_window_reaches_is_kept(index_offset, day_offset, window):
    index = FIRST + timedelta(days=index_offset)
    day = index + timedelta(days=day_offset)
    if _reachable(day, index, window):
        assert _kept(day, window)


def test_the_first_and_last_reachable_days_are_kept_and_their_neighbours_are_not():
    window = (-730, -1)
    first_reachable = FIRST - timedelta(days=730)  # 730 days before the first possible index
    last_reachable = LAST - timedelta(days=1)  # the day before the last possible index
    assert _kept(first_reachable, window)
    assert _kept(last_reachable, window)
    assert not _kept(first_reachable - timedelta(days=1), window)
    assert not _kept(last_reachable + timedelta(days=1), window)


def test_a_window_without_a_start_keeps_all_history():
    assert _kept(date(1900, 1, 1), (None, 0))
    assert not _kept(LAST + timedelta(days=1), (None, 0))
