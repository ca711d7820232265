"""Fetching a Spark output to the driver in bounded batches, as an Arrow table.

``DataFrame.toArrow()`` collects every partition of an output at once; on a cluster the
driver's memory would then grow with the cohort (and ``spark.driver.maxResultSize``, 1g by
default, would fail a large one). Here the JVM hands over one partition at a time
(``toLocalIterator`` without prefetch, one job per partition, so
``spark.driver.maxResultSize`` applies to a partition, not to the whole output) and Python
turns every :data:`BATCH_ROWS` rows into an Arrow record batch; only the compact Arrow table
the writers need is kept, as with DuckDB. It costs time: Python builds a Row object per row
(at 200,000 patients about 4 s more per output than ``toArrow``, benchmarks/spark_fetch.py).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import pyarrow as pa

if TYPE_CHECKING:  # pragma: no cover
    from pyspark.sql import DataFrame

# Python holds a batch as Row objects (about 1.5 kB a cohort row) until it becomes Arrow: at
# 65,536 rows that was 99 MB at 200,000 patients (benchmarks/spark_fetch.py).
BATCH_ROWS = 16_384


def arrow_schema(frame: DataFrame) -> pa.Schema:
    """The frame's schema in DuckDB's Arrow types (plain strings, date32, int32/int64)."""
    from pyspark.sql.pandas.types import to_arrow_schema

    fields = []
    for field in to_arrow_schema(frame.schema):
        kind = field.type
        if pa.types.is_large_string(kind) or pa.types.is_string_view(kind):
            kind = pa.string()
        fields.append(pa.field(field.name, kind))
    return pa.schema(fields)


def _batch(rows: list[tuple[object, ...]], schema: pa.Schema) -> pa.RecordBatch:
    columns = list(zip(*rows, strict=True)) if rows else [() for _ in schema]
    arrays = [
        pa.array(list(values), type=f.type) for values, f in zip(columns, schema, strict=True)
    ]
    return pa.RecordBatch.from_arrays(arrays, schema=schema)


def to_arrow(frame: DataFrame, batch_rows: int = BATCH_ROWS) -> pa.Table:
    """A DataFrame as an Arrow table, fetched a partition and ``batch_rows`` rows at a time.

    Rows keep the frame's order (partitions are fetched in order), so a sorted output stays
    sorted.
    """
    schema = arrow_schema(frame)
    batches: list[pa.RecordBatch] = []
    rows: list[tuple[object, ...]] = []
    for row in frame.toLocalIterator(prefetchPartitions=False):
        rows.append(tuple(row))
        if len(rows) >= batch_rows:
            batches.append(_batch(rows, schema))
            rows = []
    if rows or not batches:
        batches.append(_batch(rows, schema))
    return pa.Table.from_batches(batches, schema=schema)
