"""Overhead of the tool against a hand-written DuckDB query of the same outcomes.

A benchmark, not a test: it prints figures and asserts nothing about them.

    python benchmarks/outcome_only.py --patients 200000 [--patients 2000000] [--repeat 3]
    python benchmarks/outcome_only.py --extract synthetic_extract

The study is the demo study (``definitions/studies/orvane_multimorbidity.yaml``) without its
covariates, written to a temporary file: its index, eligibility, three outcomes and follow-up.
The hand query is ``benchmarks/outcome_only.sql``, the same outcomes written as an analyst would,
reading the extract's Parquet files directly. For each size it generates a synthetic extract
with ``ascertain synth`` (or reuses one in ``--data``, by default ``benchmarks/data/``, which is
git-ignored, under the same name build_scale.py uses), then alternately, ``--repeat`` times:

(a) ``ascertain build`` of the outcome-only study, in a child process;
(b) the hand query in another child process (DuckDB with the same threads), writing its rows
    to a Parquet file as the build writes cohort.parquet.

Both are measured with ``os.wait4`` (wall, CPU of the child, its peak RSS). It prints the medians
and the ratio tool / hand, then compares the last build's cohort.parquet with the hand query's
rows, patient by patient, on the columns both give (index date, end of follow-up, and each
outcome's prevalent and incident flags and onset date): the number of differing patients should
be 0, and every difference is printed. Figures go to ``benchmarks/results/outcome_only.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import statistics
import sys
import tempfile
from pathlib import Path
from typing import Any

import duckdb
import yaml
from _child import markdown_table, run_child, write_results
from build_scale import DATA, _build, _extract
from sqlglot import exp

ROOT = Path(__file__).resolve().parent
DEMO = ROOT.parent / "definitions" / "studies" / "orvane_multimorbidity.yaml"
HAND_SQL = ROOT / "outcome_only.sql"
RESULTS = ROOT / "results" / "outcome_only.json"
OUTCOMES = ("type2_diabetes", "ckd", "heart_failure")
COMPARED = [
    "index_date",
    "followup_end",
    *(f"{kind}_{o}" for o in OUTCOMES for kind in ("prevalent", "incident", "onset")),
]

# Run in the child: the hand query over the extract folder's Parquet files, rows to a file.
_HAND_QUERY = """
import sys, time
import duckdb
sql_file, extract, out, threads = sys.argv[1], sys.argv[2], sys.argv[3], int(sys.argv[4])
con = duckdb.connect()
con.execute("SET enable_progress_bar = false")
if threads:
    con.execute("SET threads = ?", [threads])
con.execute("SET file_search_path = ?", [extract])
query = open(sql_file, encoding="utf-8").read()
con.execute("COPY (" + query + ") TO ? (FORMAT parquet)", [out])
"""


def outcome_only_study(folder: Path) -> Path:
    """The demo study without covariates, its paths made absolute, written in ``folder``."""
    doc = yaml.safe_load(DEMO.read_text(encoding="utf-8"))
    for key in ("extract", "definitions"):
        doc[key] = str((DEMO.parent / doc[key]).resolve())
    del doc["covariates"]
    doc["study"] = f"{doc['study']}_outcome_only"
    doc["output"]["folder"] = str(folder / "unused")
    study = folder / f"{DEMO.stem}_outcome_only.yaml"
    study.write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    return study


def _hand(extract: Path, out: Path, threads: int) -> dict[str, Any]:
    cmd = [sys.executable, "-c", _HAND_QUERY, str(HAND_SQL), str(extract), str(out), str(threads)]
    child = run_child(cmd)
    if child.exit_code:
        raise SystemExit(f"the hand query failed with exit code {child.exit_code}")
    return {
        "wall_seconds": round(child.wall_seconds, 2),
        "cpu_seconds": round(child.cpu_seconds, 2),
        "peak_rss_mb": child.peak_rss_mb,
    }


def compare(cohort: Path, hand: Path) -> dict[str, Any]:
    """Patients whose compared columns differ between the tool's cohort and the hand rows.

    A patient in one and not the other counts as differing; so does any compared column that
    is not the same value (NULL equals only NULL). Up to ten differing rows of each are kept.
    """
    con = duckdb.connect()
    con.execute("SET enable_progress_bar = false")
    columns = ", ".join(["patient_id", *COMPARED])
    for name, path in (("tool", cohort), ("hand", hand)):
        file = exp.Literal.string(str(path)).sql("duckdb")  # a view cannot take a parameter
        con.execute(f"CREATE VIEW {name} AS SELECT {columns} FROM read_parquet({file})")
    differs = " OR ".join(f"t.{c} IS DISTINCT FROM h.{c}" for c in ["patient_id", *COMPARED])
    joined = "FROM tool AS t FULL JOIN hand AS h ON t.patient_id = h.patient_id WHERE " + differs
    differing = con.execute(f"SELECT COUNT(*) {joined}").fetchall()[0][0]
    by_column = {
        c: con.execute(
            "SELECT COUNT(*) FROM tool AS t FULL JOIN hand AS h ON t.patient_id = h.patient_id "
            f"WHERE t.{c} IS DISTINCT FROM h.{c}"
        ).fetchall()[0][0]
        for c in ["patient_id", *COMPARED]
    }
    sample = con.execute(
        f"SELECT COALESCE(t.patient_id, h.patient_id) AS patient, t.*, h.* {joined} "
        "ORDER BY patient LIMIT 10"
    ).fetchall()
    counts = {
        name: con.execute(f"SELECT COUNT(*) FROM {name}").fetchall()[0][0]
        for name in ("tool", "hand")
    }
    con.close()
    return {
        "tool_patients": counts["tool"],
        "hand_patients": counts["hand"],
        "differing_patients": differing,
        "differing_by_column": {c: n for c, n in by_column.items() if n},
        "sample": [[str(v) for v in row] for row in sample],
    }


def _measure(args: argparse.Namespace, study: Path, extract: Path, label: int | str) -> dict:
    out = Path(tempfile.mkdtemp(prefix="outcome-only-"))
    try:
        builds, hands = [], []
        for i in range(args.repeat):  # alternately, so a change of load falls on both
            builds.append(_build(study, extract, out / f"build{i}", "--threads", str(args.threads)))
            hands.append(_hand(extract, out / f"hand{i}.parquet", args.threads))
        last = args.repeat - 1
        check = compare(out / f"build{last}" / "cohort.parquet", out / f"hand{last}.parquet")
    finally:
        shutil.rmtree(out, ignore_errors=True)
    medians = {
        who: {
            key: round(statistics.median(r[key] for r in runs), 2)
            for key in ("wall_seconds", "cpu_seconds", "peak_rss_mb")
        }
        for who, runs in (("tool", builds), ("hand", hands))
    }
    rows = {}
    con = duckdb.connect()
    for table in ("patients", "encounters", "diagnoses", "prescriptions", "measurements"):
        files = sorted(extract.glob(f"{table}*.parquet"))
        rows[table] = con.execute(
            "SELECT COUNT(*) FROM read_parquet(?)", [[str(f) for f in files]]
        ).fetchall()[0][0]
    con.close()
    tool, hand = medians["tool"], medians["hand"]
    return {
        "extract": label,
        "patients": rows["patients"],
        "event_rows": sum(n for t, n in rows.items() if t != "patients"),
        "threads": args.threads,
        "tool": tool,
        "hand": hand,
        "ratio_wall": round(tool["wall_seconds"] / hand["wall_seconds"], 2),
        "ratio_cpu": round(tool["cpu_seconds"] / hand["cpu_seconds"], 2),
        "tool_runs": builds,
        "hand_runs": hands,
        "equality": check,
    }


def _table(results: list[dict[str, Any]]) -> str:
    head = ["patients", "event rows", "tool wall s", "hand wall s", "wall ratio",
            "tool CPU s", "hand CPU s", "CPU ratio", "tool peak MB", "hand peak MB",
            "differing patients"]  # fmt: skip
    rows = []
    for r in results:
        tool, hand = r["tool"], r["hand"]
        rows.append([f"{r['patients']:,}", f"{r['event_rows']:,}",
                     f"{tool['wall_seconds']}", f"{hand['wall_seconds']}", f"{r['ratio_wall']}",
                     f"{tool['cpu_seconds']}", f"{hand['cpu_seconds']}", f"{r['ratio_cpu']}",
                     f"{tool['peak_rss_mb']:,.0f}", f"{hand['peak_rss_mb']:,.0f}",
                     f"{r['equality']['differing_patients']}"])  # fmt: skip
    return markdown_table(head, rows)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, action="append", help="repeatable")
    parser.add_argument("--extract", type=Path, action="append", help="an existing extract")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--repeat", type=int, default=3, help="medians of this many runs each")
    parser.add_argument("--threads", type=int, default=os.cpu_count() or 1, help="both sides")
    parser.add_argument("--data", type=Path, default=DATA, help="where synthetic extracts live")
    args = parser.parse_args()
    extracts: list[tuple[int | str, Path]] = [(str(e), e.resolve()) for e in args.extract or []]
    sizes = args.patients or ([] if extracts else [200_000, 2_000_000])
    extracts += [(n, _extract(n, args.seed, args.data)) for n in sizes]
    results = []
    with tempfile.TemporaryDirectory(prefix="outcome-only-study-") as folder:
        study = outcome_only_study(Path(folder))
        for label, extract in extracts:
            results.append(_measure(args, study, extract, label))
            print(json.dumps(results[-1], indent=2), file=sys.stderr, flush=True)
    print(f"{os.cpu_count()} cores; {platform.platform()}; DuckDB {duckdb.__version__}")
    print(_table(results))
    for r in results:
        check = r["equality"]
        print(
            f"{r['patients']:,} patients: tool {check['tool_patients']:,} rows, hand "
            f"{check['hand_patients']:,} rows, {check['differing_patients']} differing patients"
            + (f" {check['differing_by_column']}" if check["differing_patients"] else "")
        )
        for row in check["sample"]:
            print("  " + " | ".join(row))
    write_results(
        RESULTS, results, duckdb=duckdb.__version__, repeat=args.repeat, hand_query=HAND_SQL.name
    )


if __name__ == "__main__":
    main()
