"""The demo study on differently shaped extracts of the same size (issue 24).

A benchmark, not a test: it prints figures and asserts nothing about them.

    python benchmarks/shapes.py [--patients 200000] [--repeat 3] [--shape value_text ...]

For each shape (``base`` is the default extract; the others are ``ascertain synth --shape``)
it generates a Parquet extract with the same seed (or reuses one in ``--data``, by default
``benchmarks/data/``, git-ignored), then builds the demo study on it in a child process,
``--repeat`` times, and once more with ``--memory-limit`` (1GB unless told). It prints one
table: event rows, the median wall time, its ratio to the base shape's, the child's peak
resident memory (``ru_maxrss`` from ``os.wait4``), DuckDB's own peak per stage (``memory_bytes``
in run.json) and the three slowest stages of the median build; then the same for the limited
builds. Figures go to ``benchmarks/results/shapes.json``.
"""

from __future__ import annotations

import argparse
import json
import shutil
import statistics
import sys
import tempfile
from pathlib import Path
from typing import Any

from _child import ascertain, markdown_table, run_child, write_results

from pipeline.synth._shapes import SHAPES

ROOT = Path(__file__).resolve().parent
DEMO = ROOT.parent / "definitions" / "studies" / "orvane_multimorbidity.yaml"
RESULTS = ROOT / "results" / "shapes.json"


def _extract(data: Path, shape: str, patients: int, seed: int) -> Path:
    folder = data / f"{patients}_seed{seed}" / shape
    if not (folder / "scenario.json").exists():
        shutil.rmtree(folder, ignore_errors=True)
        folder.parent.mkdir(parents=True, exist_ok=True)
        print(f"generating {shape} ({patients:,} patients) in {folder} ...", file=sys.stderr)
        args = ["synth", str(folder), "--patients", str(patients), "--seed", str(seed)]
        run = run_child(ascertain(*args, *(["--shape", shape] if shape != "base" else [])))
        if run.exit_code:
            raise SystemExit(f"ascertain synth failed with exit code {run.exit_code}")
    return folder


def _build(extract: Path, limit: str | None) -> dict[str, Any]:
    """One build in a child process: wall, CPU, peak RSS, and run.json's stages."""
    with tempfile.TemporaryDirectory(prefix="ascertain-shapes-") as tmp:
        out = Path(tmp) / "out"
        args = ["build", str(DEMO), "--extract", str(extract), "--out", str(out), "--quiet"]
        child = run_child(ascertain(*args, *(["--memory-limit", limit] if limit else [])))
        if child.exit_code:
            return {"exit_code": child.exit_code, "wall_seconds": child.wall_seconds}
        run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    stages = sorted(run["stages"], key=lambda s: -s["seconds"])
    return {
        "exit_code": 0,
        "wall_seconds": round(child.wall_seconds, 2),
        "cpu_seconds": round(child.cpu_seconds, 2),
        "peak_rss_mb": child.peak_rss_mb,
        "memory_limit": run["engine"].get("memory_limit"),
        "memory_limit_from": run["engine"].get("memory_limit_from"),
        "duckdb_peak_mb": round(max(s.get("memory_bytes") or 0 for s in stages) / 2**20),
        "slowest_stages": {s["name"]: s["seconds"] for s in stages[:3]},
    }


def _rows(extract: Path) -> int:
    import pyarrow.parquet as pq

    tables = ("encounters", "diagnoses", "prescriptions", "measurements")
    return sum(pq.ParquetFile(extract / f"{t}.parquet").metadata.num_rows for t in tables)


def _table(results: list[dict[str, Any]], key: str) -> str:
    base = next((r[key]["wall_seconds"] for r in results if r["shape"] == "base"), None)
    rows = []
    for r in results:
        b = r[key]
        if b.get("exit_code"):
            rows.append([r["shape"], f"{r['rows'] / 1e6:.1f} M", f"failed ({b['exit_code']})"])
            continue
        ratio = f"{b['wall_seconds'] / base:.2f}" if base else "-"
        slowest = sorted(b["slowest_stages"].items(), key=lambda item: -item[1])
        slow = ", ".join(f"{n} {s:.1f} s" for n, s in slowest)
        rows.append(
            [
                r["shape"],
                f"{r['rows'] / 1e6:.1f} M",
                f"{b['wall_seconds']:.1f} s",
                ratio,
                f"{b['cpu_seconds']:.1f} s",
                f"{b['peak_rss_mb'] / 1024:.2f} GB",
                f"{b['duckdb_peak_mb'] / 1024:.2f} GB",
                slow,
            ]
        )
    head = [
        "shape",
        "event rows",
        "wall",
        "/ base",
        "CPU",
        "peak RSS",
        "DuckDB peak",
        "slowest stages",
    ]
    return markdown_table(head, rows)


def main() -> None:
    """Generate (or reuse) each shape's extract, build, print the tables, write the JSON."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, default=200_000)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--repeat", type=int, default=1, help="unlimited builds per shape")
    parser.add_argument("--shape", action="append", choices=["base", *SHAPES])
    parser.add_argument("--memory-limit", default="1GB", help="the second run's limit ('': none)")
    parser.add_argument("--data", type=Path, default=ROOT / "data")
    args = parser.parse_args()
    results = []
    for shape in args.shape or ["base", *SHAPES]:
        extract = _extract(args.data, shape, args.patients, args.seed)
        runs = [_build(extract, None) for _ in range(args.repeat)]
        ok = [r for r in runs if not r["exit_code"]] or runs
        median = sorted(ok, key=lambda r: r["wall_seconds"])[(len(ok) - 1) // 2]
        limited = _build(extract, args.memory_limit) if args.memory_limit else {"exit_code": "-"}
        walls = [r["wall_seconds"] for r in runs]
        cpus = [r.get("cpu_seconds") for r in runs]
        results.append(
            {
                "shape": shape,
                "rows": _rows(extract),
                "unlimited": median,
                "unlimited_walls": walls,
                "unlimited_median": statistics.median(walls),
                "unlimited_cpu_seconds": cpus,
                "limited": limited,
            }
        )
        done = f"{shape}: {walls} s (CPU {cpus} s); limited {limited.get('wall_seconds')} s"
        print(done, file=sys.stderr)
    print(f"\n{args.patients:,} patients, unlimited (median of {args.repeat})\n")
    print(_table(results, "unlimited"))
    if args.memory_limit:
        print(f"\n{args.patients:,} patients, --memory-limit {args.memory_limit}\n")
        print(_table(results, "limited"))
    write_results(RESULTS, results, patients=args.patients, seed=args.seed)


if __name__ == "__main__":
    main()
