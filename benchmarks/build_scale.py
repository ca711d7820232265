"""Build time and memory of the demo study against the time DuckDB needs to read the extract.

A benchmark, not a test: it prints figures and asserts nothing about them.

    python benchmarks/build_scale.py --patients 200000 --patients 2000000 [--repeat 3]

For each size it generates a synthetic Parquet extract with ``ascertain synth`` (or reuses one
already in ``benchmarks/data/``, which is git-ignored), then measures in the same run:

(a) the scan floor: DuckDB reading every column the study reads, once, in one query per
    table that folds each column into ``BIT_XOR(HASH(column))`` (so every value is read and
    no Parquet statistics can answer it);
(b) the full ``ascertain build`` of the study, in a child process;
(c) the ratio b / a;
(d) the build's peak resident memory (``ru_maxrss`` of the child, from ``os.wait4``);
(e) the build again with ``--memory-limit`` (default 1GB) and ``--threads 2``;
(f) for a study that checks exact duplicates, the duplicate floor: DuckDB grouping each table
    on the columns the check groups on, once, with nothing else; the least any exact check can
    cost, and the reason (b) cannot come near (a) while the check is on;
(g) the patient floor: each event table's rows joined once to the patients (reading the
    Parquet files directly), counting known patients and rows dated after death; the least
    work that checks every row against its patient, as every build must.

Each size is measured for the study as written and for a variant of it with
``quality: {exact_duplicates: skip}`` (written to a temporary file), since finding exact
duplicates is the costliest part of a build at scale. (a) and (b) are the best of ``--repeat``
runs; (e) runs once. The per-stage seconds of the
best build come from its ``run.json``. Figures go to ``benchmarks/results/build_scale.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import duckdb
import yaml
from _child import ascertain, markdown_table, run_child, write_results
from sqlglot import exp

from pipeline.config import load_study
from pipeline.extract import discover_extract
from pipeline.workflows.build import plan_study

ROOT = Path(__file__).resolve().parent
DEMO = ROOT.parent / "definitions" / "studies" / "orvane_multimorbidity.yaml"
DATA = ROOT / "data"
RESULTS = ROOT / "results" / "build_scale.json"


def _extract(patients: int, seed: int, data: Path = DATA) -> Path:
    """A synthetic extract of ``patients`` in ``data``, made by ``ascertain synth`` if missing."""
    folder = data / f"synth_{patients}_seed{seed}"
    if not (folder / "scenario.json").exists():
        shutil.rmtree(folder, ignore_errors=True)
        folder.parent.mkdir(parents=True, exist_ok=True)
        print(f"generating {patients:,} patients in {folder} ...", file=sys.stderr, flush=True)
        run = run_child(
            ascertain("synth", str(folder), "--patients", str(patients), "--seed", str(seed))
        )
        if run.exit_code:
            raise SystemExit(f"ascertain synth failed with exit code {run.exit_code}")
    return folder


def _table_reads(study: Path, extract: Path) -> list[tuple[list[exp.Column], exp.Table]]:
    """For each table the study reads: the columns it reads that the extract has, and the read."""
    plan = plan_study(study)
    tables = discover_extract(extract, plan.sources)
    reads = []
    for source in plan.sources:
        table = tables[source.name]
        present = [exp.column(c) for c in source.columns if c in table.columns]
        files = exp.Array(expressions=[exp.Literal.string(str(f)) for f in table.files])
        reads.append((present, exp.Table(this=exp.func("read_parquet", files))))
    return reads


def _floor_queries(study: Path, extract: Path) -> list[str]:
    """One query per table reading every column the study reads from it."""
    return [
        exp.select(*(exp.func("BIT_XOR", exp.func("HASH", c)) for c in present))
        .from_(read)
        .sql("duckdb")
        for present, read in _table_reads(study, extract)
    ]


def _duplicate_floor_queries(study: Path, extract: Path) -> list[str]:
    """One query per table grouping it on the columns the exact-duplicate check groups on."""
    if load_study(study).study.quality.exact_duplicates != "check":
        return []
    queries = []
    for present, read in _table_reads(study, extract):
        copies = exp.func("COUNT", exp.Star()).as_("copies")
        groups = exp.select(*present, copies).from_(read).group_by(*present)
        count = exp.select(exp.func("COUNT", exp.Star())).from_(groups.subquery("g"))
        queries.append(count.sql("duckdb"))
    return queries


# The date each event table's rows are checked against death and end of data by.
_EVENT_DATES = {
    "encounters": "encounter_date",
    "diagnoses": "event_date",
    "prescriptions": "start_date",
    "measurements": "obs_date",
}


def _patient_floor_queries(study: Path, extract: Path) -> list[str]:
    """One query per event table joining each row to its patient, as every build must.

    It counts the rows with a known patient and those dated after the patient's death: the
    least work that checks each row against its patient (the orphan and after-death reasons).
    """
    plan = plan_study(study)
    tables = discover_extract(extract, plan.sources)
    reads = {
        name: exp.Table(
            this=exp.func(
                "read_parquet",
                exp.Array(expressions=[exp.Literal.string(str(f)) for f in tables[name].files]),
            )
        )
        for name in tables
    }
    queries = []
    for source in plan.sources:
        date = _EVENT_DATES.get(source.name)
        if date is None:
            continue
        after_death = exp.column(date, "r") > exp.column("death_date", "p")
        counts = [
            exp.func("COUNT", exp.column("patient_id", "p")),
            exp.func("COUNT_IF", after_death),
        ]
        joined = (
            exp.select(*counts)
            .from_(reads[source.name].copy().as_("r"))
            .join(
                reads["patients"].copy().as_("p"),
                on=exp.column("patient_id", "p").eq(exp.column("patient_id", "r")),
                join_type="left",
            )
        )
        queries.append(joined.sql("duckdb"))
    return queries


def _skip_variant(study: Path, folder: Path) -> Path:
    """A copy of ``study`` that skips the exact-duplicate check, its paths made absolute."""
    doc = yaml.safe_load(study.read_text(encoding="utf-8"))
    for key in ("extract", "definitions"):
        doc[key] = str((study.parent / doc[key]).resolve())
    doc["output"]["folder"] = str(folder / "unused")
    doc["study"] = f"{doc['study']}_skip_duplicates"
    doc["quality"] = {"exact_duplicates": "skip"}
    variant = folder / f"{study.stem}_skip_duplicates.yaml"
    variant.write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    return variant


_TIMED_QUERIES = """
import json, sys, time
import duckdb
queries, threads = json.loads(sys.argv[1]), int(sys.argv[2])
con = duckdb.connect()
con.execute("SET enable_progress_bar = false")  # it would print to stdout, which carries the time
if threads:
    con.execute("SET threads = ?", [threads])
started = time.perf_counter()
for sql in queries:
    con.execute(sql).fetchall()
print(time.perf_counter() - started)
"""


def _scan_floor(queries: list[str], threads: int | None) -> float:
    """Seconds to run ``queries``, in a child process.

    Not in this process: on Linux a child's peak RSS starts at its parent's RSS when forked, so
    a floor query run here would inflate every build's measured peak memory.
    """
    cmd = [sys.executable, "-c", _TIMED_QUERIES, json.dumps(queries), str(threads or 0)]
    done = subprocess.run(cmd, capture_output=True, text=True, check=True)
    return float(done.stdout.strip())


def _build(study: Path, extract: Path, out: Path, *extra: str) -> dict[str, object]:
    args = ["build", str(study), "--extract", str(extract), "--out", str(out), "--quiet", *extra]
    child = run_child(ascertain(*args))
    if child.exit_code:
        raise SystemExit(f"ascertain {' '.join(args)} failed with exit code {child.exit_code}")
    run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    stages = sorted(run["stages"], key=lambda s: -s["seconds"])
    return {
        "wall_seconds": round(child.wall_seconds, 2),
        "cpu_seconds": round(child.cpu_seconds, 1),
        "peak_rss_mb": child.peak_rss_mb,
        "cohort_patients": run["counts"]["cohort_patients"],
        "slowest_stages": {s["name"]: s["seconds"] for s in stages[:8]},
    }


def _measure(args: argparse.Namespace, study: Path, patients: int) -> dict[str, object]:
    extract = _extract(patients, args.seed)
    queries = _floor_queries(study, extract)
    floors = [_scan_floor(queries, args.threads) for _ in range(args.repeat)]
    duplicate_queries = _duplicate_floor_queries(study, extract)
    duplicate_floor = _scan_floor(duplicate_queries, args.threads) if duplicate_queries else None
    patient_floor = _scan_floor(_patient_floor_queries(study, extract), args.threads)
    out = Path(tempfile.mkdtemp(prefix="build-scale-"))
    try:
        threads = ["--threads", str(args.threads)] if args.threads else []
        builds = [_build(study, extract, out / f"run{i}", *threads) for i in range(args.repeat)]
        best = min(builds, key=lambda b: b["wall_seconds"])
        limited = _build(
            study, extract, out / "limited", "--memory-limit", args.memory_limit, "--threads", "2"
        )
    finally:
        shutil.rmtree(out, ignore_errors=True)
    rows = {}
    con = duckdb.connect()
    for parquet in sorted(extract.glob("*.parquet")):
        count = exp.select(exp.func("COUNT", exp.Star())).from_(
            exp.Table(this=exp.func("read_parquet", exp.Literal.string(str(parquet))))
        )
        rows[parquet.stem] = con.execute(count.sql("duckdb")).fetchall()[0][0]
    con.close()
    floor = min(floors)
    return {
        "study": study.stem,
        "patients": patients,
        "event_rows": sum(n for t, n in rows.items() if t not in ("patients", "truth")),
        "parquet_mb": round(sum(p.stat().st_size for p in extract.glob("*.parquet")) / 2**20),
        "scan_floor_seconds": round(floor, 2),
        "build": best,
        "build_all_seconds": [b["wall_seconds"] for b in builds],
        "ratio": round(float(best["wall_seconds"]) / floor, 1),  # type: ignore[arg-type]
        "duplicate_floor_seconds": None if duplicate_floor is None else round(duplicate_floor, 2),
        "patient_floor_seconds": round(patient_floor, 2),
        "memory_limited": {"memory_limit": args.memory_limit, "threads": 2, **limited},
    }


def _table(results: list[dict[str, object]]) -> str:
    head = ["study", "patients", "event rows", "floor s", "patient floor s", "duplicate floor s",
            "build s", "ratio", "peak MB", "limited s", "limited peak MB"]  # fmt: skip
    rows = []
    for r in results:
        build, limited = r["build"], r["memory_limited"]
        assert isinstance(build, dict)
        assert isinstance(limited, dict)
        rows.append([str(r["study"]), f"{r['patients']:,}", f"{r['event_rows']:,}",
                     f"{r['scan_floor_seconds']}", f"{r['patient_floor_seconds']}",
                     f"{r['duplicate_floor_seconds'] or '-'}",
                     f"{build['wall_seconds']}", f"{r['ratio']}", f"{build['peak_rss_mb']:,}",
                     f"{limited['wall_seconds']}", f"{limited['peak_rss_mb']:,}"])  # fmt: skip
    return markdown_table(head, rows)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, action="append", help="repeatable")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--repeat", type=int, default=3, help="best of this many runs")
    parser.add_argument("--study", type=Path, default=DEMO)
    parser.add_argument("--threads", type=int, help="engine threads (default: all cores)")
    parser.add_argument("--memory-limit", default="1GB", help="for the memory-limited run")
    args = parser.parse_args()
    results = []
    with tempfile.TemporaryDirectory(prefix="build-scale-studies-") as folder:
        studies = [args.study, _skip_variant(args.study, Path(folder))]
        for patients in args.patients or [200_000, 2_000_000]:
            for study in studies:
                results.append(_measure(args, study, patients))
                print(json.dumps(results[-1], indent=2), file=sys.stderr, flush=True)
    print(f"{os.cpu_count()} cores; {platform.platform()}; DuckDB {duckdb.__version__}")
    print(_table(results))
    write_results(
        RESULTS, results, duckdb=duckdb.__version__, repeat=args.repeat, study=str(args.study)
    )


if __name__ == "__main__":
    main()
