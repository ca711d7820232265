"""What matched controls cost: the demo study and the matched example study on one extract.

A benchmark, not a test: it prints figures and asserts nothing about them.

    python benchmarks/matching.py --patients 200000 [--repeat 3]

It generates (or reuses, in the git-ignored ``benchmarks/data/``) a synthetic Parquet extract
with ``ascertain synth`` and builds the demo study and ``definitions/studies/orvane_hf_matched``
(heart failure cases, 4 controls each, without replacement) ``--repeat`` times each,
alternating so that a busy machine slows both alike. Each build runs in a child process; the
medians of wall time are printed with their ratio (the issue's target: at most 1.5), the sets
and candidate pairs, and the matching stages' own seconds from ``run.json``. Figures go to
``benchmarks/results/matching.json``.
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
    args = parser.parse_args()
    extract = _extract(args.patients, args.seed)
    threads = ["--threads", str(args.threads)] if args.threads else []
    runs: dict[str, list[dict[str, Any]]] = {"demo": [], "matched": []}
    with tempfile.TemporaryDirectory(prefix="matching-") as scratch:
        folder = Path(scratch)
        for i in range(args.repeat):
            for name, study in (("demo", DEMO), ("matched", MATCHED)):
                runs[name].append(_build(study, extract, folder / f"{name}{i}", threads))
                print(name, json.dumps(runs[name][-1]), file=sys.stderr, flush=True)
    medians = {
        name: statistics.median(float(r["wall_seconds"]) for r in found)
        for name, found in runs.items()
    }
    ratio = medians["matched"] / medians["demo"]
    last = runs["matched"][-1]
    print(
        markdown_table(
            ["patients", "demo (median)", "matched (median)", "ratio", "sets", "pairs"],
            [
                [
                    f"{args.patients:,}",
                    f"{medians['demo']:.1f} s",
                    f"{medians['matched']:.1f} s",
                    f"{ratio:.2f}",
                    f"{(last['matching'] or {}).get('cases', 0):,}",
                    f"{last['candidate_pairs'] or 0:,}",
                ]
            ],
        )
    )
    write_results(
        RESULTS, [{"patients": args.patients, "medians": medians, "ratio": ratio, "runs": runs}]
    )


if __name__ == "__main__":
    main()
