"""``ascertain verify``: rebuild an output folder from its manifest and compare, bit for bit.

Where the inputs are and what differs is read by :mod:`pipeline.outputs._verify`; the rebuild
is an ordinary build (:func:`pipeline.workflows.build.build_study`) into a temporary folder,
so it prepares the study and its engine exactly as the first build did.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

from pipeline.outputs import read_manifest
from pipeline.outputs._verify import VerifyResult, compare_rebuild, locate_inputs
from pipeline.workflows.build import build_study
from pipeline.workflows.prepare import BuildOptions

__all__ = ["VerifyResult", "locate_inputs", "verify_output"]


def verify_output(
    folder: Path,
    *,
    study: Path | None = None,
    extract: Path | str | None = None,
    spark_master: str | None = None,
    spark_conf: tuple[str, ...] = (),
) -> VerifyResult:
    """Rebuild an output folder from its manifest in a temporary folder and compare.

    The inputs may live elsewhere than at the build (another machine, another layout): they
    are found as :func:`locate_inputs` says and compared by their recorded relative paths.

    Args:
        folder: An output folder written by ``build``.
        study: The study file, when it is not where the manifest's hint says.
        extract: The extract folder, mapping file or connection URI, when not where the
            manifest's hint says.
        spark_master: Rebuild on this Spark master (default: the recorded engine; Spark
            builds on ``local[*]``, since the recorded master may not be reachable from here).
        spark_conf: ``key=value`` Spark settings for the rebuild (implies Spark).

    Raises:
        AscertainError: The folder has no manifest, an input cannot be found, or the rebuild
            fails.
    """
    manifest = read_manifest(folder)
    study, extract = locate_inputs(folder, manifest, study, extract)
    with tempfile.TemporaryDirectory(prefix="ascertain-verify-") as scratch:
        rebuilt = Path(scratch) / "out"
        options = BuildOptions(
            extract=extract,
            out=rebuilt,
            threads=manifest["engine"].get("threads"),
            engine="spark"
            if spark_master or spark_conf
            else manifest["engine"].get("name", "duckdb"),
            spark_master=spark_master,
            spark_conf=spark_conf,
        )
        build_study(study, options)
        again = read_manifest(rebuilt)
    return compare_rebuild(folder, manifest, again)
