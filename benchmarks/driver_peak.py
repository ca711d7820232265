"""The peak resident memory of the Python process running one ascertain command.

Runs the command line in this process (not a child), so the figure is the driver's Python
side alone: on Spark the JVM is a process of its own and is not counted. Printed on stderr
when the command ends, whatever its exit status, as ``python_peak_rss_mb N seconds S``.

    python benchmarks/driver_peak.py build definitions/studies/orvane_multimorbidity.yaml \\
        --extract EXTRACT --out OUT --engine spark --spark-master 'local[2]' --quiet
"""

from __future__ import annotations

import atexit
import resource
import sys
import time


def _report(started: float) -> None:
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux
    seconds = time.perf_counter() - started
    sys.stderr.write(f"python_peak_rss_mb {peak_mb:.0f} seconds {seconds:.0f}\n")


def main() -> None:
    atexit.register(_report, time.perf_counter())
    from pipeline.cli import app

    sys.argv = ["ascertain", *sys.argv[1:]]
    app()


if __name__ == "__main__":
    main()
