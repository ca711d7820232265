"""A sweep of rule windows against one build of the same study, timed in the same run.

A benchmark, not a test: it prints figures and asserts nothing about them.

    python benchmarks/sweep.py --patients 200000 [--variants 10] [--repeat 1]

It generates a synthetic Parquet extract with ``ascertain synth`` (or reuses one already in
``benchmarks/data/``, git-ignored), writes a sweep file with ``--variants`` values of the
heart failure two-code window over the demo study, then times in child processes, one after
the other: ``ascertain build`` of the demo study, and ``ascertain sweep`` of the sweep file
(the base and every variant in one DuckDB session). Both include loading and compiling; the
sweep also writes its table and page. It prints the ratio sweep / build and how many stages
the sweep ran, against how many the variants would run one by one, and how many were shared.
Figures go to ``benchmarks/results/sweep.json``.
"""

from __future__ import annotations

import argparse
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

from _child import ascertain, markdown_table, run_child, write_results

ROOT = Path(__file__).resolve().parent
DEMO = ROOT.parent / "definitions" / "studies" / "orvane_multimorbidity.yaml"
DATA = ROOT / "data"
RESULTS = ROOT / "results" / "sweep.json"
SUMMARY = re.compile(r"ran (\d+) stages instead of (\d+), (\d+) shared")


def _extract(patients: int, seed: int) -> Path:
    folder = DATA / f"synth_{patients}_seed{seed}"
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


def _sweep_file(folder: Path, variants: int) -> Path:
    """Windows from 365 days up in steps of 73, none equal to the base's 730."""
    values = [365 + 73 * i for i in range(variants + 1) if 365 + 73 * i != 730][:variants]
    text = (
        f"sweep: window_benchmark\nbase: {DEMO}\noutcomes: [heart_failure]\ngrid:\n"
        "  - key: definition.heart_failure.rules.two heart failure codes.within_days\n"
        f"    label: window\n    values: {values}\n"
    )
    file = folder / "sweep.yaml"
    file.write_text(text, encoding="utf-8")
    return file


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, default=200_000)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--variants", type=int, default=10)
    parser.add_argument("--repeat", type=int, default=1)
    args = parser.parse_args()
    extract = _extract(args.patients, args.seed)
    results = []
    with tempfile.TemporaryDirectory(prefix="ascertain-sweep-bench-") as scratch:
        work = Path(scratch)
        sweep = _sweep_file(work, args.variants)
        for attempt in range(args.repeat):
            build_out, sweep_out = work / f"build{attempt}", work / f"sweep{attempt}"
            build = run_child(
                ascertain(
                    "build",
                    str(DEMO),
                    "--extract",
                    str(extract),
                    "--out",
                    str(build_out),
                    "--quiet",
                )
            )
            log = work / f"sweep{attempt}.txt"
            with log.open("wb") as handle:
                swept = run_child(
                    ascertain(
                        "sweep", str(sweep), "--extract", str(extract), "--out", str(sweep_out)
                    ),
                    stdout=handle,
                    stderr=subprocess.STDOUT,
                )
            output = log.read_text(encoding="utf-8")
            if build.exit_code or swept.exit_code:
                raise SystemExit(f"a child failed: build {build.exit_code}, sweep:\n{output}")
            found = SUMMARY.search(output)
            ran, alone, shared = (int(g) for g in found.groups()) if found else (0, 0, 0)
            results.append(
                {
                    "patients": args.patients,
                    "variants": args.variants,
                    "build_seconds": round(build.wall_seconds, 1),
                    "sweep_seconds": round(swept.wall_seconds, 1),
                    "ratio": round(swept.wall_seconds / build.wall_seconds, 2),
                    "build_peak_mb": build.peak_rss_mb,
                    "sweep_peak_mb": swept.peak_rss_mb,
                    "stages_run": ran,
                    "stages_one_by_one": alone,
                    "stages_shared": shared,
                }
            )
    head = list(results[0])
    print(markdown_table(head, [[str(r[k]) for k in head] for r in results]))
    write_results(RESULTS, results)


if __name__ == "__main__":
    main()
