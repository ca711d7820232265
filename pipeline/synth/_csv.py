"""Unreadable dates, which only a text file can carry.

A Parquet DATE column cannot hold ``2015-13-45``, so the spoiled dates exist only in CSV
output: each event table's date column is written as text there, and a stated share of rows
gets a date no ``YYYY-MM-DD`` reader accepts, in one of two shapes seen in real feeds: the month
pushed past 12 (``2015-13-04``, a month and day mixed up on entry) or a day-first date
(``04/01/2015``, another system's format).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from pipeline.extract.schema import CANONICAL_TABLES

EVENT_DATE_COLUMNS: dict[str, str] = {
    t.name: t.row_date
    for t in sorted(CANONICAL_TABLES, key=lambda t: t.name)
    if t.name != "patients"
}
"""The date column of each event table that may be spoiled in CSV output, by table name in
alphabetical order (the order the random draws are made in, so the same seed spoils the same
rows)."""


def _two_digits(values: pa.Array) -> pa.Array:
    return pc.utf8_lpad(pc.cast(values, pa.string()), 2, "0")


def spoil_dates(rng: np.random.Generator, tables: dict[str, pa.Table], rate: float) -> None:
    """Turn each event table's date column to text and spoil a ``rate`` share of it, in place.

    Draws one uniform per row and table, in :data:`EVENT_DATE_COLUMNS` order, after every other
    draw of the chunk, so that the Parquet output of the same seed is unchanged.

    Args:
        rng: The chunk's generator.
        tables: The chunk's tables by name; event tables are replaced.
        rate: Share of rows whose date becomes unreadable.
    """
    for name, column in EVENT_DATE_COLUMNS.items():
        table = tables[name]
        dates = table.column(column).combine_chunks()
        text = pc.cast(dates, pa.string())
        n = table.num_rows
        u = rng.random(n)
        spoil = u < rate
        if spoil.any():
            which = np.flatnonzero(spoil)
            picked = dates.take(pa.array(which))
            year = pc.cast(pc.year(picked), pa.string())
            month_past_12 = pc.binary_join_element_wise(
                year, _two_digits(pc.add(pc.month(picked), 12)), _two_digits(pc.day(picked)), "-"
            )
            day_first = pc.binary_join_element_wise(
                _two_digits(pc.day(picked)), _two_digits(pc.month(picked)), year, "/"
            )
            shape = u[which] < rate / 2
            bad = pc.if_else(pa.array(shape), month_past_12, day_first)
            mask = np.zeros(n, dtype=bool)
            mask[which] = True
            full = np.zeros(n, dtype=np.int64)
            full[which] = np.arange(which.shape[0])
            text = pc.if_else(pa.array(mask), bad.take(pa.array(full)), text)
        index = table.schema.get_field_index(column)
        tables[name] = table.set_column(index, pa.field(column, pa.string()), text)
