"""The demo study built by two versions of the tool, alternately, on the same extracts (issue 24).

A benchmark, not a test: it prints figures and asserts nothing about them.

    python benchmarks/paired.py --before <source tree> [--after <source tree>]
        [--patients 200000] [--repeat 3] [--shape base --shape value_text ...] [--data <folder>]

A source tree is a folder holding a ``pipeline`` package, such as one extracted with
``git archive <commit> | tar -x -C <folder>``; without ``--after`` the installed package is the
"after" side. Each build runs in a child process whose working folder is a temporary one (so an
editable install of the current tree cannot shadow ``PYTHONPATH``), with each tree's own demo
study. Builds alternate before, after, before, after... so that load from other work on the
machine falls on both sides alike. For each shape it prints the medians of wall time, CPU
seconds (user + system, from ``os.wait4``), peak resident memory and the paired ratios
after / before (the median of the per-pair ratios), then the slowest stages of each side from
run.json. On a shared machine CPU seconds compare the two sides more fairly than wall time,
which counts time spent waiting for other processes. It also says whether both sides wrote the
same cohort, quality log and attrition bytes.

Extracts are made with ``ascertain synth`` (seed 1, ``--shape`` unless ``base``) in
``--data`` (default ``benchmarks/data/``, git-ignored) unless already there. Figures go to
``benchmarks/results/paired.json``.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import statistics
import sys
import tempfile
from pathlib import Path
from typing import Any

from _child import markdown_table, run_child, write_results
from shapes import _extract, _rows

ROOT = Path(__file__).resolve().parent
RESULTS = ROOT / "results" / "paired.json"
STUDY = Path("definitions") / "studies" / "orvane_multimorbidity.yaml"
COMPARED = ("cohort.parquet", "quality.csv", "attrition.csv")
_CLI = "from pipeline.cli import app; app()"


def _build(tree: Path | None, extract: Path) -> dict[str, Any]:
    """One build by the tree's package (the installed one when None), in a child process."""
    env = dict(os.environ)
    if tree is None:
        env.pop("PYTHONPATH", None)
        study = ROOT.parent / STUDY
    else:
        env["PYTHONPATH"] = str(tree)
        study = tree / STUDY
    with tempfile.TemporaryDirectory(prefix="ascertain-paired-") as tmp:
        out = Path(tmp) / "out"
        cmd = [sys.executable, "-c", _CLI, "build", str(study), "--extract", str(extract)]
        cmd += ["--out", str(out), "--quiet"]
        child = run_child(cmd, cwd=Path(tmp), env=env)
        if child.exit_code:
            raise SystemExit(f"build by {tree or 'installed'} failed ({child.exit_code})")
        run = json.loads((out / "run.json").read_text(encoding="utf-8"))
        digests = {n: hashlib.sha256((out / n).read_bytes()).hexdigest() for n in COMPARED}
    return {
        "wall_seconds": round(child.wall_seconds, 2),
        "cpu_seconds": round(child.cpu_seconds, 2),
        "peak_rss_mb": child.peak_rss_mb,
        "stages": {s["name"]: s["seconds"] for s in run["stages"]},
        "digests": digests,
    }


def _which(tree: Path | None) -> str:
    """The file the child imports ``pipeline`` from, to show which tree was measured."""
    env = dict(os.environ)
    if tree is not None:
        env["PYTHONPATH"] = str(tree)
    code = "import pipeline, sys; sys.stderr.write(pipeline.__file__)"
    with tempfile.TemporaryDirectory() as tmp, tempfile.TemporaryFile() as err:
        run_child([sys.executable, "-c", code], stderr=err, cwd=Path(tmp), env=env)
        err.seek(0)
        return err.read().decode()


def _median_stages(builds: list[dict[str, Any]], top: int) -> dict[str, float]:
    names = builds[0]["stages"]
    medians = {n: statistics.median(b["stages"].get(n, 0.0) for b in builds) for n in names}
    return dict(sorted(medians.items(), key=lambda item: -item[1])[:top])


def _summary(shape: str, pairs: list[tuple[dict[str, Any], dict[str, Any]]]) -> dict[str, Any]:
    before = [b for b, _ in pairs]
    after = [a for _, a in pairs]
    out: dict[str, Any] = {"shape": shape}
    for key in ("wall_seconds", "cpu_seconds", "peak_rss_mb"):
        out[key] = {
            "before": statistics.median(b[key] for b in before),
            "after": statistics.median(a[key] for a in after),
            "ratio": round(statistics.median(a[key] / b[key] for b, a in pairs), 3),
        }
    out["same_outputs"] = all(b["digests"] == a["digests"] for b, a in pairs)
    out["stages_before"] = _median_stages(before, 6)
    out["stages_after"] = _median_stages(after, 6)
    out["pairs"] = [{"before": b, "after": a} for b, a in pairs]
    return out


def _table(results: list[dict[str, Any]]) -> str:
    head = ["shape", "event rows", "wall before", "wall after", "ratio", "CPU before",
            "CPU after", "ratio", "peak RSS before", "peak RSS after", "same outputs"]  # fmt: skip
    rows = []
    for r in results:
        wall, cpu, rss = r["wall_seconds"], r["cpu_seconds"], r["peak_rss_mb"]
        rows.append([r["shape"], f"{r['rows'] / 1e6:.1f} M",
                     f"{wall['before']:.1f} s", f"{wall['after']:.1f} s", f"{wall['ratio']:.2f}",
                     f"{cpu['before']:.1f} s", f"{cpu['after']:.1f} s", f"{cpu['ratio']:.2f}",
                     f"{rss['before'] / 1024:.2f} GB", f"{rss['after'] / 1024:.2f} GB",
                     "yes" if r["same_outputs"] else "NO"])  # fmt: skip
    return markdown_table(head, rows)


def main() -> None:
    """Build alternately with both trees on each shape, print the tables, write the JSON."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--before", type=Path, required=True, help="source tree measured first")
    parser.add_argument("--after", type=Path, help="source tree (default: the installed one)")
    parser.add_argument("--patients", type=int, default=200_000)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--repeat", type=int, default=3, help="pairs of builds per shape")
    parser.add_argument("--shape", action="append", help="base or a synth shape (repeatable)")
    parser.add_argument("--data", type=Path, default=ROOT / "data")
    args = parser.parse_args()
    before = args.before.resolve()
    after = args.after.resolve() if args.after else None
    print(f"before: {_which(before)}\nafter: {_which(after)}", file=sys.stderr, flush=True)
    results = []
    for shape in args.shape or ["base"]:
        extract = _extract(args.data, shape, args.patients, args.seed).resolve()
        pairs = []
        for i in range(args.repeat):
            pairs.append((_build(before, extract), _build(after, extract)))
            b, a = pairs[-1]
            print(
                f"{shape} pair {i + 1}: wall {b['wall_seconds']} -> {a['wall_seconds']} s, "
                f"CPU {b['cpu_seconds']} -> {a['cpu_seconds']} s",
                file=sys.stderr,
                flush=True,
            )
        results.append({**_summary(shape, pairs), "rows": _rows(extract)})
    print(f"\n{args.patients:,} patients, medians of {args.repeat} pairs\n")
    print(_table(results))
    for r in results:
        for side in ("before", "after"):
            slow = ", ".join(f"{n} {s:.1f} s" for n, s in r[f"stages_{side}"].items())
            print(f"\n{r['shape']} {side}: {slow}")
    write_results(RESULTS, results, patients=args.patients, seed=args.seed, repeat=args.repeat)


if __name__ == "__main__":
    main()
