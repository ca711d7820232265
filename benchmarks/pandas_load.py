"""What a naive pandas script pays just to hold the extract (a benchmark, not a test).

A naive pandas version of the demo study starts by loading the extract tables into DataFrames,
before any cohort logic. This measures that first step alone, so its figures are a lower bound
for such a script: each table's columns that the study reads are loaded with
``pandas.read_parquet`` (default dtypes, text as Python objects) and kept, as such a script
keeps them, in a child process whose address space is capped (``--cap-gb``, default 20) so an
extract too big for the machine fails with MemoryError instead of exhausting it.

    python benchmarks/pandas_load.py --patients 200000 --patients 2000000

It uses the extracts ``build_scale.py`` generates in ``benchmarks/data/`` (run that first), and
prints the wall time and peak resident memory per size, or that the load failed.
"""

from __future__ import annotations

import argparse
import json
import resource
import sys
import tempfile
from pathlib import Path

from _child import run_child

DATA = Path(__file__).resolve().parent / "data"
COLUMNS = {
    "patients": ["patient_id", "birth_date", "sex", "death_date"],
    "encounters": ["patient_id", "encounter_date", "encounter_type"],
    "diagnoses": ["patient_id", "event_date", "code_system", "code", "source"],
    "prescriptions": ["patient_id", "start_date", "stop_date", "atc"],
    "measurements": ["patient_id", "obs_date", "measure", "value", "value_text", "unit"],
}

_CHILD = """
import sys, pandas as pd
frames = {t: pd.read_parquet(f"{sys.argv[1]}/{t}.parquet", columns=c) for t, c in COLUMNS.items()}
print(sum(len(f) for f in frames.values()))
"""


def _cap(gigabytes: float) -> None:
    limit = int(gigabytes * 2**30)
    resource.setrlimit(resource.RLIMIT_AS, (limit, limit))


def _load(extract: Path, cap_gb: float) -> dict[str, object]:
    """Load the extract in a child capped at ``cap_gb`` of address space."""
    code = f"COLUMNS = {COLUMNS!r}\n{_CHILD}"
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        # The parent runs no threads, so setting the limit before exec is safe.
        run = run_child(
            [sys.executable, "-c", code, str(extract)],
            stdout=out,
            stderr=err,
            before=lambda: _cap(cap_gb),
        )
        out.seek(0)
        err.seek(0)
        printed, errors = out.read().decode().strip(), err.read().decode().strip()
    failed = run.exit_code != 0
    return {
        "wall_seconds": round(run.wall_seconds, 1),
        "peak_rss_mb": run.peak_rss_mb,
        "rows": None if failed else int(printed),
        "failed": (errors.splitlines() or ["killed"])[-1] if failed else None,
        "cap_gb": cap_gb,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, action="append", help="repeatable")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--cap-gb", type=float, default=20.0)
    args = parser.parse_args()
    for patients in args.patients or [200_000]:
        extract = DATA / f"synth_{patients}_seed{args.seed}"
        if not extract.exists():
            raise SystemExit(f"{extract} is missing: run build_scale.py --patients {patients}")
        print(json.dumps({"patients": patients, **_load(extract, args.cap_gb)}), flush=True)


if __name__ == "__main__":
    main()
