"""Driver memory while fetching a build's outputs from Spark: whole (toArrow) or in batches.

For each size: a synthetic extract (``ascertain synth``, seed 1), a DuckDB build of the demo
study, then for each way of fetching and each repeat a fresh process with a Spark session
(``local[2]``, ``--master URL``, or ``--cluster``: a standalone master and one worker started
on 127.0.0.1 as ``tests/test_spark_cluster.py`` starts them, so the executors sort in a JVM of
their own and the driver's heap shows the fetch alone) that reads ``cohort.parquet`` and
``population.parquet`` in shuffled order, stores them as the engine stores a stage (a local
checkpoint), and fetches them to Python sorted by patient: ``whole`` as ``ORDER BY`` +
``toArrow()``, ``batched`` as the engine does (``pipeline.engine._spark_fetch.to_arrow``).
Measured per fetch: seconds, the peak of the driver JVM's heap during the fetch (the JVM's own
memory-pool peaks, reset before it; on ``local[2]`` the executors' sorting runs in the same
JVM), the peak of its old generation alone (where G1 puts Arrow buffers of half a region and
more, and what survives collections) and the growth of the Python process's peak resident
memory. Both ways must give equal tables (the SHA-256 of each table's Arrow IPC stream is
printed). Medians of ``--repeat`` runs (3 by default). ``--partition-rows`` sets the batched
fetch's partition size in the fetching process only (the engine's ``PARTITION_ROWS``, 50,000,
is not changed); ``--cache DIR`` keeps each size's extract and build in ``DIR/p<patients>``
and reuses them.

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
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
STUDY = ROOT / "definitions" / "studies" / "orvane_multimorbidity.yaml"


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


def _fetch(folder: Path, how: str, master: str, partition_rows: int | None) -> dict[str, object]:
    import pyarrow as pa
    from pyspark.sql import functions as F

    from pipeline.engine import SparkEngine, _spark_fetch
    from pipeline.engine._spark_fetch import arrow_schema, to_arrow

    if partition_rows:
        _spark_fetch.PARTITION_ROWS = partition_rows  # this process only
    conf = CLUSTER_CONF if master.startswith("spark://") else {}
    spark = SparkEngine.create_session(master, conf)
    jvm = spark.sparkContext._jvm
    pools = [
        p
        for p in jvm.java.lang.management.ManagementFactory.getMemoryPoolMXBeans()
        if str(p.getType().toString()) == "Heap memory"
    ]
    old = [p for p in pools if "Old Gen" in str(p.getName())]
    result: dict[str, object] = {
        "how": how,
        "master": "cluster" if master.startswith("spark://") else master,
        "partition_rows": _spark_fetch.PARTITION_ROWS,
    }
    for name in ("cohort", "population"):
        frame = spark.read.parquet(str(folder / f"{name}.parquet"))
        # A stage arrives unsorted: shuffle it, then store it as the engine stores a stage.
        frame = frame.orderBy(F.rand(seed=1)).localCheckpoint(eager=True)
        jvm.java.lang.System.gc()
        for pool in pools:
            pool.resetPeakUsage()
        baseline = sum(int(p.getUsage().getUsed()) for p in pools)
        rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        started = time.perf_counter()
        if how == "whole":
            table = frame.orderBy("patient_id").toArrow().cast(arrow_schema(frame))
        else:
            table = to_arrow(frame, ("patient_id",))
        seconds = time.perf_counter() - started
        peak = sum(int(p.getPeakUsage().getUsed()) for p in pools)
        old_peak = sum(int(p.getPeakUsage().getUsed()) for p in old)
        rss_after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        sink = pa.BufferOutputStream()
        with pa.ipc.new_stream(sink, table.schema) as writer:
            writer.write_table(table.combine_chunks())
        result[name] = {
            "rows": table.num_rows,
            "seconds": round(seconds, 2),
            "jvm_heap_before_mb": round(baseline / 2**20),
            "jvm_heap_peak_mb": round(peak / 2**20),
            "jvm_old_peak_mb": round(old_peak / 2**20),
            "python_peak_growth_mb": round((rss_after - rss_before) / 1024),
            "arrow_mb": round(table.nbytes / 2**20, 1),
            "sha256": hashlib.sha256(sink.getvalue().to_pybytes()).hexdigest()[:16],
        }
    spark.stop()
    return result


def _median(runs: list[dict[str, object]]) -> dict[str, object]:
    """Per output, the median of each measured figure over the runs (hashes must agree)."""
    result: dict[str, object] = {key: runs[0][key] for key in ("how", "master", "partition_rows")}
    result["runs"] = len(runs)
    for name in ("cohort", "population"):
        tables = [run[name] for run in runs]
        assert len({t["sha256"] for t in tables}) == 1, "runs fetched different tables"  # type: ignore[index]
        result[name] = {
            key: statistics.median(t[key] for t in tables)  # type: ignore[index]
            if key != "sha256"
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


def _measure(args: argparse.Namespace, master: str, env: dict[str, str] | None) -> None:
    with tempfile.TemporaryDirectory(prefix="ascertain-fetch-") as scratch:
        for patients in args.patients or [200_000]:
            out = _outputs(patients, args.cache, Path(scratch))
            for how in ("whole", "batched"):
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
    parser.add_argument("--fetch", help=argparse.SUPPRESS)
    parser.add_argument("--folder", help=argparse.SUPPRESS)
    args = parser.parse_args()
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
