"""What ``persontime:`` adds to a build: the demo study with and without it, in the same run.

A benchmark, not a test: it prints figures and asserts nothing about them.

    python benchmarks/persontime_scale.py --patients 200000 [--repeat 3]

It generates (or reuses, in the git-ignored ``benchmarks/data/``) a synthetic Parquet extract
with ``ascertain synth``, writes a variant of the demo study with
``persontime: {age_bands: [40, 50, 60, 70, 80], calendar_year: true, since_index_years: [0, 1,
3]}`` to a temporary file, and builds both ``--repeat`` times each, alternating (plain, person-
time, plain, ...) so that a busy machine slows both alike. Each build runs in a child process;
the medians of wall time are printed with their ratio, the rows of ``persontime.parquet`` and
the person-time stages' own seconds from ``run.json``. Figures go to
``benchmarks/results/persontime_scale.json``.
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

import yaml
from _child import ascertain, markdown_table, run_child, write_results
from build_scale import DEMO, _extract

RESULTS = Path(__file__).resolve().parent / "results" / "persontime_scale.json"
OPTION = {"age_bands": [40, 50, 60, 70, 80], "calendar_year": True, "since_index_years": [0, 1, 3]}


def _variant(study: Path, folder: Path) -> Path:
    """The study with the person-time option, its paths made absolute."""
    doc = yaml.safe_load(study.read_text(encoding="utf-8"))
    for key in ("extract", "definitions"):
        doc[key] = str((study.parent / doc[key]).resolve())
    doc["study"] = f"{doc['study']}_persontime"
    doc["persontime"] = OPTION
    variant = folder / f"{study.stem}_persontime.yaml"
    variant.write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    return variant


def _build(study: Path, extract: Path, out: Path, threads: list[str]) -> dict[str, Any]:
    args = ["build", str(study), "--extract", str(extract), "--out", str(out), "--quiet"]
    child = run_child(ascertain(*args, *threads))
    if child.exit_code:
        raise SystemExit(f"ascertain {' '.join(args)} failed with exit code {child.exit_code}")
    run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    own = {s["name"]: s["seconds"] for s in run["stages"] if s["name"].startswith("persontime")}
    shutil.rmtree(out)
    return {
        "wall_seconds": round(child.wall_seconds, 2),
        "peak_rss_mb": child.peak_rss_mb,
        "persontime_rows": manifest["rows"].get("persontime"),
        "persontime_stages": own,
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
    runs: dict[str, list[dict[str, Any]]] = {"demo": [], "persontime": []}
    with tempfile.TemporaryDirectory(prefix="persontime-scale-") as scratch:
        folder = Path(scratch)
        studies = {"demo": DEMO, "persontime": _variant(DEMO, folder)}
        for i in range(args.repeat):
            for name, study in studies.items():
                runs[name].append(_build(study, extract, folder / f"{name}{i}", threads))
                print(name, json.dumps(runs[name][-1]), file=sys.stderr, flush=True)
    medians = {
        name: statistics.median(float(r["wall_seconds"]) for r in found)
        for name, found in runs.items()
    }
    ratio = medians["persontime"] / medians["demo"]
    rows = runs["persontime"][0]["persontime_rows"]
    print(
        markdown_table(
            ["patients", "demo build (median)", "with persontime (median)", "ratio", "cells"],
            [
                [
                    f"{args.patients:,}",
                    f"{medians['demo']:.1f} s",
                    f"{medians['persontime']:.1f} s",
                    f"{ratio:.2f}",
                    f"{rows:,}",
                ]
            ],
        )
    )
    write_results(
        RESULTS, [{"patients": args.patients, "medians": medians, "ratio": ratio, "runs": runs}]
    )


if __name__ == "__main__":
    main()
