"""Person-time is streamed from the engine to its file: the same bytes, bounded batches.

``write_parquet_stream`` writes a stream of batches one row group at a time; it must give the
bytes ``write_parquet`` gives for the whole table, however the rows arrive, so the file does
not depend on the engine or its batch size. The engine hands a sink the output's rows sorted,
batch by batch, instead of returning them.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from pipeline.compile import ColumnDoc
from pipeline.engine import DuckDBEngine
from pipeline.engine import duckdb as duckdb_engine
from pipeline.extract import discover_extract
from pipeline.outputs import write_parquet, write_parquet_stream
from pipeline.outputs._write import with_column_docs
from pipeline.workflows.build import plan_study

from .test_persontime import _copy_fixture

DOCS = (ColumnDoc("days", "integer", "days", "follow-up days in the cell", "counted", ""),)


def _cells(rows: int) -> pa.Table:
    """A person-time-like table: ids, text, dates, integers with nulls, a double."""
    return pa.table(
        {
            "patient_id": [f"p{i // 7:05d}" for i in range(rows)],
            "age_band": [("40-49", "50-59", "80+")[i % 3] for i in range(rows)],
            "cell_start": [dt.date(2015, 1, 1) + dt.timedelta(days=i % 900) for i in range(rows)],
            "days": pa.array([(i * 37) % 366 for i in range(rows)], pa.int32()),
            "events_ckd": pa.array([None if i % 5 else i % 2 for i in range(rows)], pa.int8()),
            "share": [i / 7 for i in range(rows)],
        }
    )


def _batches(table: pa.Table, sizes: list[int]) -> pa.RecordBatchReader:
    out, start = [], 0
    for size in [*sizes, table.num_rows]:  # the rest in one last batch
        out += table.slice(start, size).to_batches()
        start = min(start + size, table.num_rows)
    return pa.RecordBatchReader.from_batches(table.schema, [b for b in out if b.num_rows])


@pytest.mark.parametrize(
    ("rows", "group", "sizes"),
    [
        (2500, 1000, [333, 1, 999, 1000, 7]),  # batches across row-group boundaries
        (2500, 1000, [2500]),  # one batch holding several row groups
        (3000, 1000, [1000, 1000, 1000]),  # groups exactly full
        (2500, 1_000_000, [100] * 25),  # many batches, one row group
        (0, 1000, []),  # an empty output
    ],
)
def test_a_streamed_file_is_the_file_written_whole(
    tmp_path: Path, rows: int, group: int, sizes: list[int]
) -> None:
    table = _cells(rows)
    whole, streamed = tmp_path / "whole.parquet", tmp_path / "streamed.parquet"
    write_parquet(with_column_docs(table, DOCS), whole, group)
    assert write_parquet_stream(_batches(table, sizes), streamed, DOCS, group) == rows
    assert streamed.read_bytes() == whole.read_bytes()
    groups = pq.ParquetFile(streamed).metadata.num_row_groups
    assert groups == max(1, -(-rows // group))  # bounded: no row group above `group` rows


def test_the_engine_streams_an_output_to_its_sink_in_sorted_batches(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    study = _copy_fixture(tmp_path)
    plan = plan_study(study)
    tables = discover_extract(study.parent, plan.sources)
    whole = DuckDBEngine(threads=1).run(plan, tables).outputs["persontime"]
    monkeypatch.setattr(duckdb_engine, "FETCH_ROWS", 5)  # 22 cells in batches of 5
    seen: list[pa.RecordBatch] = []

    def sink(batches: pa.RecordBatchReader) -> int:
        seen.extend(batches)
        return sum(b.num_rows for b in seen)

    run = DuckDBEngine(threads=1).run(plan, tables, sinks={"persontime": sink})
    assert "persontime" not in run.outputs
    assert run.streamed == {"persontime": 22}
    assert [b.num_rows for b in seen] == [5, 5, 5, 5, 2]
    assert pa.Table.from_batches(seen).equals(whole)  # the same rows in the same order
