"""Driver memory while fetching a build's outputs from Spark: whole (toArrow) or in batches.

For each size: a synthetic extract (``ascertain synth``, seed 1), a DuckDB build of the demo
study, then for each way of fetching and each repeat a fresh process with a ``local[2]`` Spark
session that reads ``cohort.parquet`` and ``population.parquet`` in shuffled order, stores
them as the engine stores a stage (a local checkpoint), and fetches them to Python sorted by
patient: ``whole`` as ``ORDER BY`` + ``toArrow()``, ``batched`` as the engine does
(``pipeline.engine._spark_fetch.to_arrow``). Measured per fetch: seconds, the peak of the
driver JVM's heap during the fetch (the JVM's own memory-pool peaks, reset before it; on
``local[2]`` the executors' sorting runs in the same JVM) and the growth of the Python
process's peak resident memory. Both ways must give equal tables (the SHA-256 of each table's
Arrow IPC stream is printed). Medians of ``--repeat`` runs (3 by default).

    python benchmarks/spark_fetch.py --patients 20000 --patients 200000
"""

from __future__ import annotations

import argparse
import hashlib
import json
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
STUDY = ROOT / "definitions" / "studies" / "orvane_multimorbidity.yaml"


def _fetch(folder: Path, how: str) -> dict[str, object]:
    import pyarrow as pa
    from pyspark.sql import functions as F

    from pipeline.engine import SparkEngine
    from pipeline.engine._spark_fetch import arrow_schema, to_arrow

    spark = SparkEngine.create_session("local[2]")
    jvm = spark.sparkContext._jvm
    pools = [
        p
        for p in jvm.java.lang.management.ManagementFactory.getMemoryPoolMXBeans()
        if str(p.getType().toString()) == "Heap memory"
    ]
    result: dict[str, object] = {"how": how}
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
        rss_after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        sink = pa.BufferOutputStream()
        with pa.ipc.new_stream(sink, table.schema) as writer:
            writer.write_table(table.combine_chunks())
        result[name] = {
            "rows": table.num_rows,
            "seconds": round(seconds, 2),
            "jvm_heap_before_mb": round(baseline / 2**20),
            "jvm_heap_peak_mb": round(peak / 2**20),
            "python_peak_growth_mb": round((rss_after - rss_before) / 1024),
            "arrow_mb": round(table.nbytes / 2**20, 1),
            "sha256": hashlib.sha256(sink.getvalue().to_pybytes()).hexdigest()[:16],
        }
    spark.stop()
    return result


def _median(runs: list[dict[str, object]]) -> dict[str, object]:
    """Per output, the median of each measured figure over the runs (hashes must agree)."""
    result: dict[str, object] = {"how": runs[0]["how"], "runs": len(runs)}
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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--patients", type=int, action="append", default=[])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--fetch", help=argparse.SUPPRESS)
    parser.add_argument("--folder", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.fetch:
        print(json.dumps(_fetch(Path(args.folder), args.fetch)))
        return
    for patients in args.patients or [200_000]:
        with tempfile.TemporaryDirectory(prefix="ascertain-fetch-") as scratch:
            extract, out = Path(scratch) / "extract", Path(scratch) / "out"
            ascertain = [sys.executable, "-c", "from pipeline.cli import app; app()"]
            synth = [*ascertain, "synth", str(extract), "--patients", str(patients)]
            subprocess.run(synth, check=True, capture_output=True)
            build = [*ascertain, "build", str(STUDY), "--extract", str(extract), "--out", str(out)]
            subprocess.run([*build, "--quiet"], check=True, capture_output=True)
            for how in ("whole", "batched"):
                runs = []
                for _ in range(args.repeat):
                    command = [sys.executable, __file__, "--fetch", how, "--folder", str(out)]
                    done = subprocess.run(command, check=False, capture_output=True, text=True)
                    if done.returncode != 0:
                        sys.exit(f"{how} fetch failed:\n{done.stderr[-3000:]}")
                    runs.append(json.loads(done.stdout.strip().splitlines()[-1]))
                    print(json.dumps({"patients": patients, **runs[-1]}), flush=True)
                print(json.dumps({"patients": patients, "median": _median(runs)}), flush=True)


if __name__ == "__main__":
    main()
