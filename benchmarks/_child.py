"""What the benchmarks share: measuring one child process, printing and writing figures."""

from __future__ import annotations

import json
import os
import platform
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any


@dataclass(frozen=True)
class ChildRun:
    """One child process: exit code, wall and CPU seconds, and its own peak RSS."""

    exit_code: int
    wall_seconds: float
    cpu_seconds: float
    peak_rss_mb: int


def ascertain(*args: str) -> list[str]:
    """The command running ``ascertain`` with ``args`` in this interpreter."""
    return [sys.executable, "-c", "from pipeline.cli import app; app()", *args]


def run_child(
    cmd: list[str],
    *,
    stdout: IO[bytes] | int = subprocess.DEVNULL,
    stderr: IO[bytes] | int | None = None,
    before: Callable[[], None] | None = None,
    cwd: Path | None = None,
    env: dict[str, str] | None = None,
) -> ChildRun:
    """Run ``cmd`` and reap it with ``os.wait4``, which gives that child's own resource usage
    (``ru_maxrss`` is KiB on Linux), unmixed with other runs."""
    started = time.perf_counter()
    child = subprocess.Popen(cmd, stdout=stdout, stderr=stderr, preexec_fn=before, cwd=cwd, env=env)
    _, status, usage = os.wait4(child.pid, 0)
    return ChildRun(
        exit_code=os.waitstatus_to_exitcode(status),
        wall_seconds=time.perf_counter() - started,
        cpu_seconds=usage.ru_utime + usage.ru_stime,
        peak_rss_mb=round(usage.ru_maxrss / 1024),
    )


def markdown_table(head: list[str], rows: list[list[str]]) -> str:
    """A plain Markdown table, for pasting figures into the README."""
    lines = [head, ["---"] * len(head), *rows]
    return "\n".join(" | ".join(cells) for cells in lines)


def write_results(path: Path, results: list[dict[str, Any]], **extra: Any) -> None:
    """Write the figures with a description of the machine, and say where."""
    path.parent.mkdir(parents=True, exist_ok=True)
    meta = {
        "cpus": os.cpu_count(),
        "platform": platform.platform(),
        "python": platform.python_version(),
        **extra,
        "results": results,
    }
    path.write_text(json.dumps(meta, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    print(f"figures written to {path}")
