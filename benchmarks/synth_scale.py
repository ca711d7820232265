"""Generation time and peak memory of ``ascertain synth`` at a few sizes (a benchmark, not a test).

Each size runs ``ascertain synth`` in a child process and reaps it with ``os.wait4``, which
returns that child's own resource usage: its peak resident set size (``ru_maxrss``, KiB on
Linux) and CPU time, unmixed with other runs.

    python benchmarks/synth_scale.py --patients 200000 --patients 2000000 [--out DIR]

Prints a table and writes the figures to ``benchmarks/results/synth_scale.json``
(``benchmarks/results/`` is git-ignored). The extracts are deleted afterwards unless ``--keep``.
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
from pathlib import Path

import pyarrow.parquet as pq
from _child import ascertain, markdown_table, run_child, write_results

TABLES = ("patients", "encounters", "diagnoses", "prescriptions", "measurements", "truth")
RESULTS = Path(__file__).resolve().parent / "results" / "synth_scale.json"


def _run_one(patients: int, seed: int, out: Path) -> dict[str, object]:
    """Generate one extract in a child process and measure it."""
    run = run_child(ascertain("synth", str(out), "--patients", str(patients), "--seed", str(seed)))
    if run.exit_code:
        raise SystemExit(f"ascertain synth failed with exit code {run.exit_code}")
    rows = {t: pq.read_metadata(out / f"{t}.parquet").num_rows for t in TABLES}
    size = sum((out / f"{t}.parquet").stat().st_size for t in TABLES)
    return {
        "patients": patients,
        "seed": seed,
        "wall_seconds": round(run.wall_seconds, 1),
        "cpu_seconds": round(run.cpu_seconds, 1),
        "peak_rss_mb": run.peak_rss_mb,
        "rows": rows,
        "event_rows": sum(v for k, v in rows.items() if k not in ("patients", "truth")),
        "parquet_mb": round(size / 2**20, 1),
    }


def _table(results: list[dict[str, object]]) -> str:
    head = ["N", "wall s", "cpu s", "peak RSS MB", *TABLES, "Parquet MB"]
    rows = []
    for r in results:
        counts = r["rows"]
        assert isinstance(counts, dict)
        rows.append(
            [
                f"{r['patients']:,}",
                f"{r['wall_seconds']}",
                f"{r['cpu_seconds']}",
                f"{r['peak_rss_mb']:.0f}",
                *(f"{counts[t]:,}" for t in TABLES),
                f"{r['parquet_mb']}",
            ]
        )
    return markdown_table(head, rows)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, action="append", help="repeatable")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--out", type=Path, help="where to write the extracts (default: tmp)")
    parser.add_argument("--keep", action="store_true", help="keep the extracts")
    args = parser.parse_args()
    sizes = args.patients or [200_000]
    base = args.out or Path(tempfile.mkdtemp(prefix="synth-scale-"))
    results = []
    for n in sizes:
        out = base / f"synth_{n}"
        results.append(_run_one(n, args.seed, out))
        if not args.keep:
            shutil.rmtree(out)
        print(_table(results[-1:]).splitlines()[-1], file=sys.stderr, flush=True)
    if not args.keep and args.out is None:
        shutil.rmtree(base, ignore_errors=True)
    print(_table(results))
    write_results(RESULTS, results)


if __name__ == "__main__":
    main()
