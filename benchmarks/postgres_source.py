"""The demo study built from a PostgreSQL server against the same extract read from Parquet.

A benchmark, not a test: it prints figures and asserts nothing about them (it does check that
both builds wrote the same cohort, attrition and quality files).

    python benchmarks/postgres_source.py [--patients 200000] [--repeat 1]

It generates a synthetic Parquet extract with ``ascertain synth`` (or reuses one in
``benchmarks/data/``, git-ignored), starts a throwaway PostgreSQL server (tests/pg_server.py:
the distribution's binaries, a temporary data directory, a random port on 127.0.0.1), loads
the extract into it in canonical shape (batch by batch, not timed), and then measures, each
in a child process: ``ascertain build`` on the Parquet folder and on the server (a connection
URI, the password in PGPASSWORD): wall seconds and the child's peak resident memory
(``ru_maxrss`` from ``os.wait4``; the server's own memory is not in it). The database build
includes streaming every table the plan reads to a temporary Parquet copy and the server-side
row checksums. Figures go to ``benchmarks/results/postgres_source.json``.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
from _child import ascertain, markdown_table, run_child, write_results

ROOT = Path(__file__).resolve().parent
sys.path.insert(0, str(ROOT.parent))
from tests.pg_server import running_server  # noqa: E402

DEMO = ROOT.parent / "definitions" / "studies" / "orvane_multimorbidity.yaml"
DATA = ROOT / "data"
RESULTS = ROOT / "results" / "postgres_source.json"
TABLES = ("patients", "encounters", "diagnoses", "prescriptions", "measurements")
COMPARED = ("cohort.parquet", "attrition.csv", "quality.csv")


def _extract(patients: int, seed: int) -> Path:
    folder = DATA / f"synth_{patients}_seed{seed}"
    if not (folder / "scenario.json").exists():
        folder.parent.mkdir(parents=True, exist_ok=True)
        print(f"generating {patients:,} patients in {folder} ...", file=sys.stderr, flush=True)
        run = run_child(
            ascertain("synth", str(folder), "--patients", str(patients), "--seed", str(seed))
        )
        if run.exit_code:
            raise SystemExit(f"ascertain synth failed with exit code {run.exit_code}")
    return folder


def _load(server, extract: Path) -> int:
    """Load each table batch by batch (bounded memory); return the rows loaded."""
    rows = 0
    with server.connect() as con, con.cursor() as cursor:
        cursor.execute("CREATE SCHEMA orvane")
        for table in TABLES:
            parquet = pq.ParquetFile(extract / f"{table}.parquet")
            reader = pa.RecordBatchReader.from_batches(
                parquet.schema_arrow, parquet.iter_batches(batch_size=200_000)
            )
            rows += cursor.adbc_ingest(table, reader, mode="create", db_schema_name="orvane")
        cursor.execute("ANALYZE")
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, default=200_000)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--repeat", type=int, default=1)
    args = parser.parse_args()
    extract = _extract(args.patients, args.seed)
    results = []
    with running_server() as server, tempfile.TemporaryDirectory() as scratch:
        print("loading the extract into PostgreSQL ...", file=sys.stderr, flush=True)
        loaded = _load(server, extract)
        uri = f"{server.uri()}?schema=orvane"
        os.environ["PGPASSWORD"] = server.admin_password  # the child's libpq reads it
        outs = {}
        for source, where in (("parquet", str(extract)), ("postgresql", uri)):
            runs = []
            for attempt in range(args.repeat):
                out = Path(scratch) / f"{source}_{attempt}"
                command = ascertain("build", str(DEMO), "--extract", where, "--out", str(out))
                run = run_child([*command, "--quiet"])
                if run.exit_code:
                    raise SystemExit(f"the {source} build failed with exit code {run.exit_code}")
                runs.append(run)
                outs[source] = out
            best = min(runs, key=lambda r: r.wall_seconds)
            results.append(
                {
                    "source": source,
                    "patients": args.patients,
                    "rows": loaded,
                    "wall_seconds": round(best.wall_seconds, 2),
                    "cpu_seconds": round(best.cpu_seconds, 2),
                    "peak_rss_mb": max(r.peak_rss_mb for r in runs),
                }
            )
        same = all(
            (outs["parquet"] / n).read_bytes() == (outs["postgresql"] / n).read_bytes()
            for n in COMPARED
        )
    print(
        markdown_table(
            ["source", "patients", "event rows", "build", "peak memory"],
            [
                [
                    r["source"],
                    f"{r['patients']:,}",
                    f"{r['rows']:,}",
                    f"{r['wall_seconds']:.1f} s",
                    f"{r['peak_rss_mb'] / 1024:.2f} GB",
                ]
                for r in results
            ],
        )
    )
    print(f"cohort, attrition and quality identical: {same}")
    write_results(RESULTS, results, identical_outputs=same, repeat=args.repeat)


if __name__ == "__main__":
    main()
