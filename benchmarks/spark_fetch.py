"""Driver memory while fetching a build's outputs from Spark: whole (toArrow) or in batches.

For each size: a synthetic extract (``ascertain synth``, seed 1), a DuckDB build of the demo
study, then for each way of fetching a fresh process with a ``local[2]`` Spark session that
reads ``cohort.parquet`` and ``population.parquet``, sorts them by patient as the engine does,
checkpoints them, and fetches them to Python. Measured per fetch: seconds, the peak of the
driver JVM's heap during the fetch (the JVM's own memory-pool peaks, reset before it) and the
growth of the Python process's peak resident memory. Both ways must give equal tables (the
SHA-256 of each table's Arrow IPC stream is printed).

    python benchmarks/spark_fetch.py --patients 200000
"""

from __future__ import annotations

import argparse
import hashlib
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
STUDY = ROOT / "definitions" / "studies" / "orvane_multimorbidity.yaml"


def _fetch(folder: Path, how: str) -> dict[str, object]:
    import pyarrow as pa

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
        frame = frame.orderBy("patient_id").localCheckpoint(eager=True)
        jvm.java.lang.System.gc()
        for pool in pools:
            pool.resetPeakUsage()
        baseline = sum(int(p.getUsage().getUsed()) for p in pools)
        rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        started = time.perf_counter()
        table = frame.toArrow().cast(arrow_schema(frame)) if how == "whole" else to_arrow(frame)
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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--patients", type=int, action="append", default=[])
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
                command = [sys.executable, __file__, "--fetch", how, "--folder", str(out)]
                done = subprocess.run(command, check=True, capture_output=True, text=True)
                line = done.stdout.strip().splitlines()[-1]
                print(json.dumps({"patients": patients, **json.loads(line)}))


if __name__ == "__main__":
    main()
