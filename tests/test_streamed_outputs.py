"""Patient-level outputs are streamed from the engine to their files: same bytes, bounded batches.

The build streams the cohort, the population, episodes and person-time (``STREAMED_FILES``).

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
from pipeline.outputs import _write, write_parquet, write_parquet_stream
from pipeline.outputs._write import with_column_docs
from pipeline.workflows.build import BuildOptions, build_study, plan_study

from .conftest import DEMO_STUDY, HANDMADE
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
@pytest.mark.parametrize("docs", [DOCS, None], ids=["documented", "undocumented"])
def test_a_streamed_file_is_the_file_written_whole(
    tmp_path: Path, rows: int, group: int, sizes: list[int], docs: tuple[ColumnDoc, ...] | None
) -> None:
    # Undocumented: population.parquet, whose schema carries no data dictionary.
    table = _cells(rows)
    whole, streamed = tmp_path / "whole.parquet", tmp_path / "streamed.parquet"
    write_parquet(table if docs is None else with_column_docs(table, docs), whole, group)
    assert write_parquet_stream(_batches(table, sizes), streamed, docs, group) == rows
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


def test_a_build_streams_its_cohort_and_population_in_bounded_row_groups(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The demo study on the hand-made extract, fetched 7 rows at a time into row groups of
    # 10: the files are those written whole from the engine's tables with groups of 10.
    plan = plan_study(DEMO_STUDY)
    whole = DuckDBEngine(threads=1).run(plan, discover_extract(HANDMADE, plan.sources)).outputs
    monkeypatch.setattr(duckdb_engine, "FETCH_ROWS", 7)
    monkeypatch.setattr(_write, "STREAMED_ROW_GROUP_ROWS", 10)
    out = tmp_path / "out"
    result = build_study(DEMO_STUDY, BuildOptions(extract=HANDMADE, out=out, threads=1))
    assert "cohort" not in result.run.outputs  # no second copy held for the caller
    assert result.run.streamed["cohort"] == result.cohort_rows == whole["cohort"].num_rows == 29
    expected = {
        "cohort": with_column_docs(whole["cohort"], plan.columns),
        "population": whole["population"],
    }
    for name, table in expected.items():
        write_parquet(table, tmp_path / f"{name}.parquet", 10)
        file = out / f"{name}.parquet"
        assert file.read_bytes() == (tmp_path / f"{name}.parquet").read_bytes(), name
        assert pq.ParquetFile(file).metadata.num_row_groups == -(-table.num_rows // 10), name
        assert result.read(name).equals(table), name


def test_a_column_past_its_dictionary_limit_gives_the_same_bytes_however_chunked(
    tmp_path: Path,
) -> None:
    # 90,000 distinct 15-character ids: about 1.7 MB of dictionary, past the writer's 1 MB
    # dictionary page limit, where it falls back to plain encoding at a point that depends on
    # where the Arrow chunks end (DuckDB's batches of 65,536 rows, Spark's partitions of
    # 50,000 gave population files of different bytes at 200,000 patients).
    ids = pa.array([f"OB-{i * 7919 % 90_000:012d}" for i in range(90_000)])
    table = pa.table({"patient_id": ids, "step": pa.array(["age", "sex", None] * 30_000)})
    files = []
    for size in (65_536, 50_000, 999):
        path = tmp_path / f"streamed_{size}.parquet"
        reader = pa.RecordBatchReader.from_batches(table.schema, table.to_batches(size))
        write_parquet_stream(reader, path, None)
        files.append(path.read_bytes())
    write_parquet(pa.Table.from_batches(table.to_batches(777)), tmp_path / "whole.parquet", 131_072)
    files.append((tmp_path / "whole.parquet").read_bytes())
    assert all(file == files[0] for file in files)
    encodings = pq.ParquetFile(tmp_path / "whole.parquet").metadata.row_group(0).column(0)
    assert "PLAIN" in str(encodings.encodings)  # the dictionary was given up, as intended
