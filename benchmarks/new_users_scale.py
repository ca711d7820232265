"""The new-user design against the demo study: both built on one extract, in the same run.

A benchmark, not a test: it prints figures and asserts nothing about them.

    python benchmarks/new_users_scale.py --patients 200000 [--repeat 3]

It generates (or reuses, in the git-ignored ``benchmarks/data/``) a synthetic Parquet extract
with ``ascertain synth`` and builds the demo study and ``definitions/studies/orvane_new_users.yaml``
(exposure groups, episodes and as-treated follow-up) ``--repeat`` times each, alternating, so
that a busy machine slows both alike. Each build runs in a child process; the medians of wall
time are printed with their ratio (the issue asks for at most 1.5), with the seconds of the
design's own stages (``index_dates``, ``episodes``, ``cohort_as_treated``) from ``run.json``.
Figures go to ``benchmarks/results/new_users_scale.json``.
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

RESULTS = Path(__file__).resolve().parent / "results" / "new_users_scale.json"
NEW_USERS = DEMO.parent / "orvane_new_users.yaml"
OWN_STAGES = ("index_dates", "episodes", "cohort_as_treated")


def _build(study: Path, extract: Path, out: Path, threads: list[str]) -> dict[str, Any]:
    args = ["build", str(study), "--extract", str(extract), "--out", str(out), "--quiet"]
    child = run_child(ascertain(*args, *threads))
    if child.exit_code:
        raise SystemExit(f"ascertain {' '.join(args)} failed with exit code {child.exit_code}")
    run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    own = {s["name"]: s["seconds"] for s in run["stages"] if s["name"] in OWN_STAGES}
    shutil.rmtree(out)
    return {
        "wall_seconds": round(child.wall_seconds, 2),
        "peak_rss_mb": child.peak_rss_mb,
        "cohort": manifest["rows"]["cohort"],
        "episodes": manifest["rows"].get("episodes"),
        "own_stages": own,
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
    studies = {"demo": DEMO, "new_users": NEW_USERS}
    runs: dict[str, list[dict[str, Any]]] = {name: [] for name in studies}
    with tempfile.TemporaryDirectory(prefix="new-users-scale-") as scratch:
        folder = Path(scratch)
        for i in range(args.repeat):
            for name, study in studies.items():
                runs[name].append(_build(study, extract, folder / f"{name}{i}", threads))
                print(name, json.dumps(runs[name][-1]), file=sys.stderr, flush=True)
    medians = {
        name: statistics.median(float(r["wall_seconds"]) for r in found)
        for name, found in runs.items()
    }
    ratio = medians["new_users"] / medians["demo"]
    print(
        markdown_table(
            ["patients", "demo build (median)", "new users (median)", "ratio", "cohort"],
            [
                [
                    f"{args.patients:,}",
                    f"{medians['demo']:.1f} s",
                    f"{medians['new_users']:.1f} s",
                    f"{ratio:.2f}",
                    f"{runs['new_users'][0]['cohort']:,}",
                ]
            ],
        )
    )
    write_results(
        RESULTS, [{"patients": args.patients, "medians": medians, "ratio": ratio, "runs": runs}]
    )


if __name__ == "__main__":
    main()
