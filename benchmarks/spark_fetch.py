"""Driver memory while fetching a build's outputs from Spark: whole, in batches, or streamed.

For each size: a synthetic extract (``ascertain synth``, seed 1), a DuckDB build of the demo
study, then for each way of fetching and each repeat a fresh process with a Spark session
(``local[2]``, ``--master URL``, or ``--cluster``: a standalone master and one worker started
on 127.0.0.1 as ``tests/test_spark_cluster.py`` starts them, so the executors sort in a JVM of
their own and the driver's heap shows the fetch alone) that reads ``cohort.parquet`` and
``population.parquet`` in shuffled order, stores them as the engine stores a stage (a local
checkpoint), and fetches them to Python sorted by patient: ``whole`` as ``ORDER BY`` +
``toArrow()``, ``batched`` as the engine's bounded fetch into one Arrow table
(``pipeline.engine._spark_fetch.to_arrow``), ``streamed`` as a build does: the same bounded
fetch written to Parquet batch by batch (``to_arrow_reader`` into ``write_parquet_stream``),
never held whole. Every way's rows are written as a build writes them afterwards, and the
files' SHA-256 (``parquet_sha256``) must be equal.
Measured per fetch: seconds, the peak of the driver JVM's heap during the fetch (the JVM's own
memory-pool peaks, reset before it; on ``local[2]`` the executors' sorting runs in the same
JVM), the peak of its old generation alone (where G1 puts Arrow buffers of half a region and
more, and what survives collections) and the growth of the Python process's peak resident
memory. Both ways must give equal tables (the SHA-256 of each table's Arrow IPC stream,
written batch by batch after combining its chunks, is printed). Medians of ``--repeat`` runs
(3 by default). ``--partition-rows`` sets the batched fetch's partition size in the fetching
process only (the engine's ``PARTITION_ROWS``, 50,000, is not changed); ``--cache DIR`` keeps
each size's extract and build in ``DIR/p<patients>`` and reuses them.

Fetch-only (``--synthetic-rows N``, repeatable): no extract or build; each process makes a
cohort-shaped frame of N rows in its session (:func:`synthetic_frame`) and fetches it one way
(one process per size and way, once each), so the outputs can be far larger than a demo
build's without the machine time of building them. Here the Python figure is the process's
peak resident memory itself (``python_peak_rss_mb``), as well as its growth.
``--driver-memory 512m`` starts the fetching driver with that heap, to see which way still
fits. Every fetch also reports ``jvm_live_peak_mb``, the largest heap in use right after a
garbage collection (the pools' collection usage, polled every 50 ms): the heap's peak counts
garbage not yet collected. It is updated only when a collection runs, and the old generation
(where the whole fetch's large buffers go) is rarely collected in a short fetch, so it can
miss what a fetch holds; read it beside the old generation's peak, not instead of it.

    python benchmarks/spark_fetch.py --cluster --synthetic-rows 1000000 --synthetic-rows 4000000
    python benchmarks/spark_fetch.py --cluster --synthetic-rows 4000000 --driver-memory 512m
    python benchmarks/spark_fetch.py --patients 20000 --patients 200000
    python benchmarks/spark_fetch.py --cluster --patients 20000 --patients 200000
"""

from __future__ import annotations

import argparse
import contextlib
import hashlib
import json
import resource
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
STUDY = ROOT / "definitions" / "studies" / "orvane_multimorbidity.yaml"


WAYS = ("whole", "batched", "streamed")
"""How an output reaches the driver: ``toArrow``, the bounded fetch into one table, or the
bounded fetch written to Parquet as it comes (what a build does)."""

# Executors on the test cluster's 1 GB worker get half of it, as in the cluster test.
CLUSTER_CONF = {"spark.executor.memory": "512m"}


@contextlib.contextmanager
def _cluster() -> Iterator[tuple[str, dict[str, str]]]:
    """The cluster test's standalone master and worker; yields its URL and the environment.

    Reuses the test module's fixture function itself (not a copy), which stops both
    processes by their ids when the block ends.
    """
    sys.path.insert(0, str(ROOT))
    from tests import test_spark_cluster as cluster_test

    class _Folders:
        def __init__(self, root: Path) -> None:
            self.root = root

        def mktemp(self, name: str) -> Path:
            folder = self.root / name
            folder.mkdir()
            return folder

    with tempfile.TemporaryDirectory(prefix="ascertain-cluster-") as scratch:
        fixture: Any = cluster_test.cluster
        starts = fixture.__wrapped__(_Folders(Path(scratch)))
        url = next(starts)
        try:
            yield url, cluster_test._environment()
        finally:
            starts.close()  # runs the fixture's own clean-up: both processes, by id


def _session(
    master: str, partition_rows: int | None, driver_memory: str | None = None
) -> tuple[Any, list[Any], list[Any]]:
    """A Spark session as the engine makes it, and the driver JVM's heap pools (all, old gen)."""
    from pipeline.engine import SparkEngine, _spark_fetch

    if partition_rows:
        _spark_fetch.PARTITION_ROWS = partition_rows  # this process only
    conf = dict(CLUSTER_CONF) if master.startswith("spark://") else {}
    if driver_memory:
        conf["spark.driver.memory"] = driver_memory
    spark = SparkEngine.create_session(master, conf)
    jvm = spark.sparkContext._jvm
    pools = [
        p
        for p in jvm.java.lang.management.ManagementFactory.getMemoryPoolMXBeans()
        if str(p.getType().toString()) == "Heap memory"
    ]
    return spark, pools, [p for p in pools if "Old Gen" in str(p.getName())]


def _fetch_one(
    spark: Any, pools: list[Any], old: list[Any], frame: Any, how: str, rows: int | None
) -> dict[str, object]:
    """Fetch ``frame`` sorted by patient one way; what it cost the driver, and its hashes.

    ``streamed`` is the build's way: the batched fetch's batches written to Parquet as they
    come (``write_parquet_stream``), never held whole. Every way's rows end in a Parquet file
    written as the build writes a streamed output (row groups of ``STREAMED_ROW_GROUP_ROWS``),
    after the figures are taken: its SHA-256 must be the same every way.
    """
    import pyarrow as pa

    from pipeline.engine._spark_fetch import arrow_schema, to_arrow, to_arrow_reader
    from pipeline.outputs import write_parquet, write_parquet_stream
    from pipeline.outputs._write import STREAMED_ROW_GROUP_ROWS

    written = Path(tempfile.mkdtemp(prefix="ascertain-fetch-")) / "output.parquet"

    spark.sparkContext._jvm.java.lang.System.gc()
    for pool in pools:
        pool.resetPeakUsage()
    baseline = sum(int(p.getUsage().getUsed()) for p in pools)
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    # The heap's peak counts garbage not yet collected; what is still held after each garbage
    # collection (the pools' collection usage, polled) is the live part.
    live = [baseline]
    done = threading.Event()

    def watch() -> None:
        while not done.wait(0.05):
            after = [p.getCollectionUsage() for p in pools]
            live[0] = max(live[0], sum(int(u.getUsed()) for u in after if u is not None))

    watcher = threading.Thread(target=watch, daemon=True)
    watcher.start()
    started = time.perf_counter()
    try:
        table = None
        if how == "whole":
            table = frame.orderBy("patient_id").toArrow().cast(arrow_schema(frame))
        elif how == "batched":
            table = to_arrow(frame, ("patient_id",), rows)
        else:
            reader = to_arrow_reader(frame, ("patient_id",), rows)
            streamed_rows = write_parquet_stream(reader, written, None)
    finally:
        done.set()
        watcher.join()
    seconds = time.perf_counter() - started
    peak = sum(int(p.getPeakUsage().getUsed()) for p in pools)
    old_peak = sum(int(p.getPeakUsage().getUsed()) for p in old)
    rss_after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    digest = None
    if table is not None:
        digest = hashlib.sha256()
        for batch in table.combine_chunks().to_batches():
            # The IPC stream of the table batch by batch: the same bytes both ways, no copy.
            sink = pa.BufferOutputStream()
            with pa.ipc.new_stream(sink, table.schema) as writer:
                writer.write_batch(batch)
            digest.update(sink.getvalue().to_pybytes())
        write_parquet(table, written, STREAMED_ROW_GROUP_ROWS)
    parquet_digest = hashlib.sha256(written.read_bytes()).hexdigest()[:16]
    parquet_mb = round(written.stat().st_size / 2**20, 1)
    written.unlink()
    written.parent.rmdir()
    return {
        "rows": table.num_rows if table is not None else streamed_rows,
        "seconds": round(seconds, 2),
        "jvm_heap_before_mb": round(baseline / 2**20),
        "jvm_heap_peak_mb": round(peak / 2**20),
        "jvm_old_peak_mb": round(old_peak / 2**20),
        "jvm_live_peak_mb": round(live[0] / 2**20),
        "python_peak_rss_mb": round(rss_after / 1024),
        "python_peak_growth_mb": round((rss_after - rss_before) / 1024),
        "arrow_mb": round(table.nbytes / 2**20, 1) if table is not None else None,
        "sha256": digest.hexdigest()[:16] if digest is not None else None,
        "parquet_mb": parquet_mb,
        "parquet_sha256": parquet_digest,
    }


def _fetch(folder: Path, how: str, master: str, partition_rows: int | None) -> dict[str, object]:
    from pyspark.sql import functions as F

    from pipeline.engine import _spark_fetch

    spark, pools, old = _session(master, partition_rows)
    result: dict[str, object] = {
        "how": how,
        "master": "cluster" if master.startswith("spark://") else master,
        "partition_rows": _spark_fetch.PARTITION_ROWS,
    }
    for name in ("cohort", "population"):
        frame = spark.read.parquet(str(folder / f"{name}.parquet"))
        # A stage arrives unsorted: shuffle it, then store it as the engine stores a stage.
        frame = frame.orderBy(F.rand(seed=1)).localCheckpoint(eager=True)
        result[name] = _fetch_one(spark, pools, old, frame, how, None)
    spark.stop()
    return result


def synthetic_frame(spark: Any, rows: int) -> Any:
    """``rows`` cohort-shaped rows made in the session, in no particular order.

    Columns as the demo cohort's kinds: a text id, a practice and sex, dates (birth, index,
    end of follow-up, an onset), integers (age, visits, days to an outcome, NULL for most),
    doubles (eGFR, BMI) and flags; about 100 bytes of Arrow a row. Each row's values come from
    a permutation of ``0..rows-1`` (multiplying by a prime modulo ``rows``), so the id order is
    not the generation order and the sort has work to do, and every run makes the same rows.
    """
    from pyspark.sql import functions as F

    key = F.pmod(F.col("id") * F.lit(2_654_435_761), F.lit(rows))
    index = F.date_add(F.lit("2015-01-01").cast("date"), (key % 1800).cast("int"))
    ill = (key % 11) == 0
    return spark.range(0, rows, 1, max(2, rows // 500_000)).select(
        F.concat(F.lit("OB"), F.lpad(key.cast("string"), 9, "0")).alias("patient_id"),
        F.concat(F.lit("P"), (key % 200).cast("string")).alias("practice_id"),
        F.when(key % 2 == 0, "F").otherwise("M").alias("sex"),
        F.date_add(F.lit("1930-01-01").cast("date"), (key % 25_000).cast("int")).alias(
            "birth_date"
        ),
        index.alias("index_date"),
        F.date_add(index, (365 + key % 2000).cast("int")).alias("end_date"),
        (18 + key % 80).cast("int").alias("age"),
        (key % 37).cast("int").alias("visits"),
        (key % 1000 / 7.0).alias("egfr"),
        (15 + key % 300 / 10.0).alias("bmi"),
        ((key % 5) == 0).alias("prevalent_ckd"),
        ill.alias("incident_ckd"),
        F.when(ill, F.date_add(index, (key % 3000).cast("int"))).alias("onset_ckd"),
        F.when(ill, (key % 3000).cast("int")).alias("days_to_ckd"),
        ((key % 7) == 0).alias("prevalent_diabetes"),
    )


def _fetch_synthetic(args: argparse.Namespace) -> dict[str, object]:
    """One fetch of a synthetic frame, in a process of its own (so its peak RSS is the fetch's)."""
    from pipeline.engine import _spark_fetch

    rows, how, master = args.synthetic, args.fetch, args.master
    spark, pools, old = _session(master, args.partition_rows, args.driver_memory)
    frame = synthetic_frame(spark, rows)
    result: dict[str, object] = {
        "how": how,
        "master": "cluster" if master.startswith("spark://") else master,
        "driver_memory": spark.conf.get("spark.driver.memory"),
        "partition_rows": _spark_fetch.PARTITION_ROWS,
        "synthetic": _fetch_one(spark, pools, old, frame, how, rows),
    }
    spark.stop()
    return result


def _median(runs: list[dict[str, object]]) -> dict[str, object]:
    """Per output, the median of each measured figure over the runs (hashes must agree)."""
    result: dict[str, object] = {key: runs[0][key] for key in ("how", "master", "partition_rows")}
    result["runs"] = len(runs)
    for name in ("cohort", "population"):
        tables = [run[name] for run in runs]
        assert len({t["parquet_sha256"] for t in tables}) == 1, "runs fetched different tables"  # type: ignore[index]
        result[name] = {
            key: statistics.median(t[key] for t in tables)  # type: ignore[index]
            if key not in ("sha256", "parquet_sha256", "arrow_mb")
            else tables[0][key]  # type: ignore[index]
            for key in tables[0]  # type: ignore[union-attr]
        }
    return result


def _outputs(patients: int, cache: Path | None, scratch: Path) -> Path:
    """The demo study's DuckDB build on a synthetic extract of ``patients`` (cached if asked)."""
    folder = (cache or scratch) / f"p{patients}"
    extract, out = folder / "extract", folder / "out"
    if (out / "population.parquet").exists():
        return out
    folder.mkdir(parents=True, exist_ok=True)
    ascertain = [sys.executable, "-c", "from pipeline.cli import app; app()"]
    synth = [*ascertain, "synth", str(extract), "--patients", str(patients)]
    subprocess.run(synth, check=True, capture_output=True)
    build = [*ascertain, "build", str(STUDY), "--extract", str(extract), "--out", str(out)]
    subprocess.run([*build, "--quiet"], check=True, capture_output=True)
    return out


def _measure_synthetic(args: argparse.Namespace, master: str, env: dict[str, str] | None) -> None:
    """Each size and way once, each in a fresh process (its peak RSS is the fetch's alone)."""
    for rows in args.synthetic_rows:
        for how in args.way or WAYS:
            command = [sys.executable, __file__, "--fetch", how, "--synthetic", str(rows)]
            command += ["--master", master]
            if args.partition_rows:
                command += ["--partition-rows", str(args.partition_rows)]
            if args.driver_memory:
                command += ["--driver-memory", args.driver_memory]
            done = subprocess.run(command, check=False, capture_output=True, text=True, env=env)
            if done.returncode != 0:
                # A fetch the driver's memory cannot hold is a result too: say how it ended.
                causes = ("Caused by", "OutOfMemory", "maxResultSize", "Java heap")
                said = [x for x in done.stderr.splitlines() if any(c in x for c in causes)]
                print(json.dumps({"rows": rows, "how": how, "failed": said[:6]}), flush=True)
                continue
            result = json.loads(done.stdout.splitlines()[-1])
            print(json.dumps({"rows": rows, **result}), flush=True)


def _measure(args: argparse.Namespace, master: str, env: dict[str, str] | None) -> None:
    if args.synthetic_rows:
        _measure_synthetic(args, master, env)
        return
    with tempfile.TemporaryDirectory(prefix="ascertain-fetch-") as scratch:
        for patients in args.patients or [200_000]:
            out = _outputs(patients, args.cache, Path(scratch))
            for how in args.way or WAYS:
                runs = []
                for _ in range(args.repeat):
                    command = [sys.executable, __file__, "--fetch", how, "--folder", str(out)]
                    command += ["--master", master]
                    if args.partition_rows:
                        command += ["--partition-rows", str(args.partition_rows)]
                    done = subprocess.run(
                        command, check=False, capture_output=True, text=True, env=env
                    )
                    if done.returncode != 0:
                        sys.exit(f"{how} fetch failed:\n{done.stderr[-3000:]}")
                    runs.append(json.loads(done.stdout.strip().splitlines()[-1]))
                    print(json.dumps({"patients": patients, **runs[-1]}), flush=True)
                print(json.dumps({"patients": patients, "median": _median(runs)}), flush=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--patients", type=int, action="append", default=[])
    parser.add_argument("--repeat", type=int, default=3)
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--master", default="local[2]", help="a Spark master URL")
    where.add_argument(
        "--cluster", action="store_true", help="start a standalone master and worker here"
    )
    parser.add_argument("--partition-rows", type=int, help="rows per batched partition")
    parser.add_argument("--cache", type=Path, help="keep and reuse extracts and builds here")
    parser.add_argument(
        "--synthetic-rows",
        type=int,
        action="append",
        default=[],
        help="fetch-only: a cohort-shaped frame of this many rows made in the session",
    )
    parser.add_argument(
        "--driver-memory", help="fetch-only: the driver's heap (spark.driver.memory), e.g. 512m"
    )
    parser.add_argument("--way", action="append", choices=WAYS, help="only this way (repeatable)")
    parser.add_argument("--fetch", help=argparse.SUPPRESS)
    parser.add_argument("--folder", help=argparse.SUPPRESS)
    parser.add_argument("--synthetic", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.fetch and args.synthetic:
        print(json.dumps(_fetch_synthetic(args)))
        return
    if args.fetch:
        print(json.dumps(_fetch(Path(args.folder), args.fetch, args.master, args.partition_rows)))
        return
    if not args.cluster:
        _measure(args, args.master, None)
        return
    with _cluster() as (url, env):
        _measure(args, url, env)


if __name__ == "__main__":
    main()
