"""The ``ascertain sweep`` command, registered by ``cli.py`` (kept apart so it stays short)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console

from pipeline._cli_options import (
    EXTRACT_HELP,
    DebugOpt,
    SparkConfOpt,
    SparkMasterOpt,
    extract_arg,
    fail_cleanly,
    progress_display,
)


def sweep_command(
    sweep_file: Annotated[Path, typer.Argument(help="The sweep file (YAML).", dir_okay=False)],
    extract: Annotated[str | None, typer.Option(help=EXTRACT_HELP)] = None,
    out: Annotated[
        Path | None,
        typer.Option(help="Write here (default: the base study's folder + _sweep_NAME)."),
    ] = None,
    keep: Annotated[
        list[str] | None,
        typer.Option(help="Also write this variant (or base) as a full build folder (repeatable)."),
    ] = None,
    threads: Annotated[int | None, typer.Option(min=1, help="Engine worker threads.")] = None,
    memory_limit: Annotated[str | None, typer.Option(help="Engine memory limit, e.g. 2GB.")] = None,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress display.")] = False,
    engine: Annotated[
        str, typer.Option(help="duckdb (default) or spark (pip install 'ascertain\\[spark]').")
    ] = "duckdb",
    spark_master: SparkMasterOpt = None,
    spark_conf: SparkConfOpt = None,
    debug: DebugOpt = False,
) -> None:
    """Build every variant of a sweep in one engine session and compare them with the base.

    Writes sweep.csv and sweep.html (suppressed for release) and ascertain-sweep.json; with
    --keep, variants/NAME/ (the variant's study files) and keep/NAME/ (its build, which
    `ascertain verify` accepts, and its report.html with the sweep's section). Each variant
    passes a build's checks first; --engine spark runs the sweep in one Spark session.

    Example: ascertain sweep definitions/studies/orvane_hf_window_sweep.yaml --out out/sweep
    """
    from pipeline.workflows.sweep import (
        SweepOptions,
        check_sweep_folder,
        run_sweep,
        sweep_folder,
        write_sweep,
    )

    options = SweepOptions(
        extract=extract_arg(extract),
        out=out,
        threads=threads,
        memory_limit=memory_limit,
        keep=tuple(keep or ()),
        engine=engine,
        spark_master=spark_master,
        spark_conf=tuple(spark_conf or ()),
    )
    folder = fail_cleanly(lambda: sweep_folder(sweep_file, options), debug=debug)
    fail_cleanly(lambda: check_sweep_folder(sweep_file, folder, options.extract), debug=debug)
    with progress_display(quiet=quiet) as on_stage:
        run = fail_cleanly(lambda: run_sweep(sweep_file, options, on_stage=on_stage), debug=debug)
    console = Console(highlight=False, soft_wrap=True)
    merged = run.merged
    console.print(
        f"{len(run.plans)} plans (base and {len(run.plans) - 1} variants): ran "
        f"{len(merged.plan.stages)} stages instead of {merged.stages_alone}, "
        f"{len(merged.shared)} shared, in {run.seconds:.1f} s",
        markup=False,
    )
    for note in run.notes:
        console.print(f"note: {note}", markup=False)
    files = fail_cleanly(lambda: write_sweep(run, folder, options), debug=debug)
    console.print("\n".join(str(f) for f in files if f.parent == folder.resolve()), markup=False)
