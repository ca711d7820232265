"""What matched controls cost: the demo study and the matched example study on one extract.

A benchmark, not a test: it prints figures and asserts nothing about them.

    python benchmarks/matching.py --patients 200000 [--repeat 3] [--study FILE] [--extract DIR]

It generates (or reuses, in the git-ignored ``benchmarks/data/``) a synthetic Parquet extract
with ``ascertain synth`` and builds the demo study and ``definitions/studies/orvane_hf_matched``
(heart failure cases, 4 controls each, without replacement) ``--repeat`` times each,
alternating so that a busy machine slows both alike. Each build runs in a child process; the
medians of wall time and of the child's CPU seconds (user plus system, from ``os.wait4``) are
printed with their ratios (the issue's target: at most 1.5), the sets and candidate pairs, and
the matching stages' own seconds from ``run.json``. On a shared machine the wall times carry
the other work's load; the CPU seconds compare the two studies better. Figures go to
``benchmarks/results/matching.json``. ``--study`` measures another matched study instead (such
as ``orvane_new_users_matched.yaml``, new users with controls from the source population;
figures then go to ``matching_<study>.json``), and ``--extract`` reads an extract made
beforehand instead of generating one.
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
from build_scale import DEMO, _extract

RESULTS = Path(__file__).resolve().parent / "results" / "matching.json"
MATCHED = DEMO.parent / "orvane_hf_matched.yaml"


def _build(study: Path, extract: Path, out: Path, threads: list[str]) -> dict[str, Any]:
    args = ["build", str(study), "--extract", str(extract), "--out", str(out), "--quiet"]
    child = run_child(ascertain(*args, *threads))
    if child.exit_code:
        raise SystemExit(f"ascertain {' '.join(args)} failed with exit code {child.exit_code}")
    run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    stages = {s["name"]: s for s in run["stages"] if s["name"].startswith("matching")}
    shutil.rmtree(out)
    return {
        "wall_seconds": round(child.wall_seconds, 2),
        "cpu_seconds": round(child.cpu_seconds, 2),
        "peak_rss_mb": child.peak_rss_mb,
        "matching": run["counts"].get("matching"),
        "candidate_pairs": stages.get("matching_candidates", {}).get("rows"),
        "matching_stages": {name: s["seconds"] for name, s in stages.items()},
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, default=200_000)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--threads", type=int, default=0)
    parser.add_argument("--study", type=Path, default=MATCHED, help="the matched study")
    parser.add_argument("--extract", type=Path, default=None, help="an extract made beforehand")
    args = parser.parse_args()
    extract = args.extract or _extract(args.patients, args.seed)
    matched = args.study.resolve()
    threads = ["--threads", str(args.threads)] if args.threads else []
    runs: dict[str, list[dict[str, Any]]] = {"demo": [], "matched": []}
    with tempfile.TemporaryDirectory(prefix="matching-") as scratch:
        folder = Path(scratch)
        for i in range(args.repeat):
            for name, study in (("demo", DEMO), ("matched", matched)):
                runs[name].append(_build(study, extract, folder / f"{name}{i}", threads))
                print(name, json.dumps(runs[name][-1]), file=sys.stderr, flush=True)
    medians = {
        name: statistics.median(float(r["wall_seconds"]) for r in found)
        for name, found in runs.items()
    }
    cpu = {
        name: statistics.median(float(r["cpu_seconds"]) for r in found)
        for name, found in runs.items()
    }
    ratio = medians["matched"] / medians["demo"]
    cpu_ratio = cpu["matched"] / cpu["demo"]
    stage_medians = {
        name: statistics.median(r["matching_stages"].get(name, 0.0) for r in runs["matched"])
        for name in runs["matched"][-1]["matching_stages"]
    }
    last = runs["matched"][-1]
    print(
        markdown_table(
            [
                "patients",
                "demo wall",
                "matched wall",
                "ratio",
                "demo CPU",
                "matched CPU",
                "ratio",
                "sets",
                "pairs",
                "matching stages",
            ],
            [
                [
                    f"{args.patients:,}",
                    f"{medians['demo']:.1f} s",
                    f"{medians['matched']:.1f} s",
                    f"{ratio:.2f}",
                    f"{cpu['demo']:.1f} s",
                    f"{cpu['matched']:.1f} s",
                    f"{cpu_ratio:.2f}",
                    f"{(last['matching'] or {}).get('cases', 0):,}",
                    f"{last['candidate_pairs'] or 0:,}",
                    f"{sum(stage_medians.values()):.1f} s",
                ]
            ],
        )
    )
    write_results(
        RESULTS if matched == MATCHED else RESULTS.with_name(f"matching_{matched.stem}.json"),
        [
            {
                "patients": args.patients,
                "medians": medians,
                "ratio": ratio,
                "cpu_medians": cpu,
                "cpu_ratio": cpu_ratio,
                "matching_stage_medians": stage_medians,
                "runs": runs,
            }
        ],
    )


if __name__ == "__main__":
    main()
