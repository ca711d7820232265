"""The ``ascertain`` command line: a thin layer over the library.

Each command parses its arguments, calls one library function and reports. Errors the user can
fix are printed as one plain message (file:line where there is one) with exit code 2.

Exit codes, the same for every command:

- 0: done (``verify``: identical; ``check``: no problems).
- 1: a negative answer, the command having run to the end: ``verify`` found a difference,
  ``check`` found problems, ``explain`` found no such patient in the extract. ``diff``,
  ``validate`` and ``profile`` report what they find and exit 0.
- 2: refused: bad arguments (typer's usage errors too), unreadable or invalid input, an output
  folder holding files ascertain did not write or overlapping the extract, an engine failure,
  an operating-system error. Nothing is written and earlier outputs are untouched.

A traceback (``--debug``, or a defect of the tool) is not part of the convention.
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console

from pipeline import BuildOptions, BuildResult, build_study, plan_study, verify_output
from pipeline._cli_options import (
    EXTRACT_HELP,
    SHAPES_HELP,
    DebugOpt,
    SparkConfOpt,
    SparkMasterOpt,
    StudyArg,
    extract_arg,
    fail_cleanly,
    progress_display,
)
from pipeline._cli_sweep import sweep_command
from pipeline.config import load_study
from pipeline.config._check import check_paths
from pipeline.engine import DuckDBEngine, SparkEngine
from pipeline.extract import as_extract
from pipeline.workflows.check import check_extract, check_lines
from pipeline.workflows.diff import diff_runs, render_diff
from pipeline.workflows.explain import explain_patient, render_trace
from pipeline.workflows.init import init_study
from pipeline.workflows.profile import (
    check_profile_folder,
    profile_extract,
    profile_notes,
    profile_table,
    write_profile,
)

app = typer.Typer(
    name="ascertain",
    help="Build analysis-ready study cohorts from coded primary-care EMR extracts.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    # Markdown: docstring lines of one paragraph are joined, so help reads as written.
    rich_markup_mode="markdown",
)

_fail_cleanly = fail_cleanly
app.command(name="sweep")(sweep_command)


@app.command()
def build(
    study: StudyArg,
    extract: Annotated[str | None, typer.Option(help=EXTRACT_HELP)] = None,
    out: Annotated[
        Path | None, typer.Option(help="Write outputs here instead of the study's folder.")
    ] = None,
    threads: Annotated[int | None, typer.Option(min=1, help="Engine worker threads.")] = None,
    memory_limit: Annotated[
        str | None, typer.Option(help="Engine memory limit, e.g. 2GB (spills beyond it).")
    ] = None,
    quiet: Annotated[bool, typer.Option("--quiet", help="No progress display.")] = False,
    profile: Annotated[
        bool, typer.Option("--profile", help="Print seconds and rows per stage.")
    ] = False,
    engine: Annotated[
        str, typer.Option(help="duckdb (default) or spark (pip install 'ascertain\\[spark]').")
    ] = "duckdb",
    spark_master: SparkMasterOpt = None,
    spark_conf: SparkConfOpt = None,
    debug: DebugOpt = False,
) -> None:
    """Build the study's cohort and its logs into the study's output folder (or --out).

    Writes cohort.parquet, population.parquet, attrition.csv, quality.csv, dictionary.csv,
    dictionary.md, manifest.json and run.json.

    Example: ascertain build definitions/studies/orvane_multimorbidity.yaml --out out/demo
    """

    def run() -> BuildResult:
        options = BuildOptions(
            extract=extract_arg(extract),
            out=out,
            threads=threads,
            memory_limit=memory_limit,
            engine=engine,
            spark_master=spark_master,
            spark_conf=tuple(spark_conf or ()),
        )
        return build_study(study, options, on_stage=on_stage)

    with progress_display(quiet=quiet) as on_stage:
        result = _fail_cleanly(run, debug=debug)
    console = Console(highlight=False)
    if profile:
        for report in result.run.stages:
            rows = "-" if report.rows is None else f"{report.rows:,}"
            console.print(f"{report.name:<24} {report.kind:<6} {report.seconds:8.3f} s {rows:>14}")
    if not quiet:
        for line in result.attrition_lines():
            console.print(line, markup=False)
    for note in result.notes:
        console.print(f"note: {note}", markup=False, soft_wrap=True)
    for warning in result.warnings:
        console.print(f"warning: {warning}", markup=False, soft_wrap=True)
    console.print(f"cohort of {result.cohort_rows:,} patients -> {result.out}")


@app.command()
def init(
    folder: Annotated[Path, typer.Argument(help="A new or empty folder for the study.")],
    extract: Annotated[
        Path | None, typer.Option(help="The extract folder the study reads (default: extract).")
    ] = None,
    debug: DebugOpt = False,
) -> None:
    """Start a study: a study file, two definitions and a README saying what to edit first.

    Writes study.yaml, definitions/type2_diabetes.yaml (copied from the shipped library),
    definitions/gout.yaml (a skeleton with every key), README.md and ascertain-init.json into
    FOLDER, which must be new or empty. `ascertain check FOLDER` passes on it as written.

    Example: ascertain init studies/my_study --extract synthetic_extract
    """
    files = _fail_cleanly(lambda: init_study(folder, extract=extract), debug=debug)
    for path in files:
        typer.echo(str(path))


@app.command()
def sql(
    study: StudyArg,
    stage: Annotated[str | None, typer.Option(help="Print only this stage.")] = None,
    dialect: Annotated[
        str, typer.Option(help="duckdb or spark: the SQL exactly as that engine runs it.")
    ] = "duckdb",
    debug: DebugOpt = False,
) -> None:
    """Print the study's plan as SQL, stage by stage, without running anything.

    Writes nothing; prints the SQL of every stage (or of --stage) to the terminal.

    Example: ascertain sql definitions/studies/orvane_multimorbidity.yaml --stage attrition
    """
    from sqlglot.dialects.dialect import Dialect

    try:
        Dialect.get_or_raise(dialect)
    except ValueError as err:
        Console(stderr=True).print(f"error: --dialect: {err}", markup=False)
        raise typer.Exit(2) from None
    plan = _fail_cleanly(lambda: plan_study(study), debug=debug)
    if stage is not None and stage not in {s.name for s in plan.stages}:
        names = ", ".join(s.name for s in plan.stages)
        Console(stderr=True).print(f"error: no stage '{stage}'; stages: {names}")
        raise typer.Exit(2)
    engines = {e.DIALECT: e for e in (DuckDBEngine, SparkEngine)}
    prepared = engines[dialect].prepare(plan) if dialect in engines else plan
    typer.echo(prepared.describe(dialect, only=stage), nl=False)


@app.command()
def synth(
    out_dir: Annotated[Path, typer.Argument(help="Folder to write the extract into.")],
    patients: Annotated[int, typer.Option(min=1, help="Number of patients.")] = 10_000,
    seed: Annotated[int, typer.Option(help="Random seed; the same seed gives the same bytes.")] = 1,
    file_format: Annotated[str, typer.Option("--format", help="parquet, csv or fhir.")] = "parquet",
    start: Annotated[
        str, typer.Option(help="First day of the extract (YYYY-MM-DD).")
    ] = "2010-01-01",
    end: Annotated[str, typer.Option(help="Last day of the extract (YYYY-MM-DD).")] = "2021-12-31",
    shape: Annotated[list[str] | None, typer.Option(help=SHAPES_HELP)] = None,
    debug: DebugOpt = False,
) -> None:
    """Write a synthetic Orvane Bay extract with its ground truth (fictional data).

    Writes patients, encounters, diagnoses, prescriptions and measurements (Parquet, CSV or
    FHIR NDJSON), the ground truth, scenario.json and ascertain-synth.json into OUT_DIR.

    Example: ascertain synth extracts/orvane_small --patients 1000 --seed 7 --format csv
    """
    from pipeline.synth import generate_extract

    try:
        first, last = dt.date.fromisoformat(start), dt.date.fromisoformat(end)
    except ValueError as err:
        Console(stderr=True).print(f"error: --start/--end: {err}")
        raise typer.Exit(2) from None
    summary = _fail_cleanly(
        lambda: generate_extract(
            out_dir,
            patients=patients,
            seed=seed,
            file_format=file_format,  # type: ignore[arg-type]  # generate_extract checks it
            start=first,
            end=last,
            shapes=tuple(shape or ()),
        ),
        debug=debug,
    )
    rows = ", ".join(f"{name} {count:,}" for name, count in sorted(summary.rows.items()))
    Console(highlight=False).print(f"wrote {summary.patients:,} patients to {out_dir}: {rows}")


@app.command()
def check(
    paths: Annotated[
        list[Path] | None, typer.Argument(help="Files or folders (default: definitions/).")
    ] = None,
    explain: Annotated[
        bool, typer.Option("--explain", help="Say what each study and definition means.")
    ] = False,
    extract: Annotated[
        str | None, typer.Option(help="Warn of definitions matching no row here.")
    ] = None,
) -> None:
    """Check study and definition files without data. Exit 0 clean, 1 problems, 2 unreadable.

    Writes nothing; prints each problem as file:line:col [code] message, each warning (a
    threshold no plausible value meets; with --extract, a definition matching no row), and
    with --explain what each definition and study means. Warnings leave the exit status.

    Example: ascertain check definitions/ --explain
    """
    report = check_paths(paths or [Path("definitions")])
    data_warnings = (
        []
        if extract is None or report.problems
        else _fail_cleanly(lambda: check_extract(report.studies, as_extract(extract)), debug=False)
    )
    console = Console(highlight=False, soft_wrap=True)
    for line in check_lines(report, explain=explain, data_warnings=data_warnings):
        console.print(line, markup=False)
    raise typer.Exit(report.exit_code)


@app.command()
def verify(
    output: Annotated[Path, typer.Argument(help="An output folder written by build.")],
    study: Annotated[
        Path | None,
        typer.Option(help="The study file (default: where the manifest says, from OUTPUT_DIR)."),
    ] = None,
    extract: Annotated[
        str | None,
        typer.Option(help="The extract (default: where the manifest says, from the study)."),
    ] = None,
    spark_master: SparkMasterOpt = None,
    spark_conf: SparkConfOpt = None,
    debug: DebugOpt = False,
) -> None:
    """Rebuild an output folder from its manifest and report whether it is identical.

    Exits 0 when identical, 1 when an input or output differs, 2 when it cannot verify.
    Spark builds are rebuilt on local[*] unless --spark-master names another master.
    Writes nothing into OUTPUT_DIR (the rebuild runs in a temporary folder); prints each
    changed input and differing output.

    Example: ascertain verify output/orvane_multimorbidity
    """
    result = _fail_cleanly(
        lambda: verify_output(
            output,
            study=study,
            extract=extract_arg(extract),
            spark_master=spark_master,
            spark_conf=tuple(spark_conf or ()),
        ),
        debug=debug,
    )
    console = Console(highlight=False, soft_wrap=True)
    for line in result.changed_inputs:
        console.print(f"changed input: {line}", markup=False)
    for name in result.differing_outputs:
        console.print(f"differs: {name}", markup=False)
    if result.identical:
        console.print(f"identical: {output} rebuilt bit for bit from its manifest")
        return
    raise typer.Exit(1)


@app.command()
def explain(
    study: StudyArg,
    patient: Annotated[str, typer.Option(help="The patient_id to trace.")],
    extract: Annotated[str | None, typer.Option(help=EXTRACT_HELP)] = None,
    output_format: Annotated[str, typer.Option("--format", help="text or json.")] = "text",
    debug: DebugOpt = False,
) -> None:
    """Trace one patient: index, each eligibility step, evidence, rules met, follow-up.

    Writes nothing; prints the trace (text, or JSON with --format json; patient-level).
    Exits 1 when no row of the extract names the patient.

    Example: ascertain explain definitions/studies/orvane_multimorbidity.yaml --patient 1042
    """
    if output_format not in ("text", "json"):
        Console(stderr=True).print(f"error: --format must be text or json, not '{output_format}'")
        raise typer.Exit(2)
    trace = _fail_cleanly(
        lambda: explain_patient(study, patient, extract=extract_arg(extract)), debug=debug
    )
    if not trace["in_extract"]:
        Console(stderr=True, highlight=False).print(
            f"no patient {patient} in the extract", markup=False
        )
        raise typer.Exit(1)
    if output_format == "json":
        typer.echo(json.dumps(trace, indent=2, sort_keys=True, default=str))
    else:
        typer.echo(render_trace(trace))


@app.command()
def diff(
    run_a: Annotated[Path, typer.Argument(help="The first output folder.")],
    run_b: Annotated[Path, typer.Argument(help="The second output folder.")],
    debug: DebugOpt = False,
) -> None:
    """Report changed inputs, patients gained and lost, and changed values between two builds.

    Writes nothing; prints the differences (patient-level: up to five ids each).

    Example: ascertain diff output/before output/after
    """
    result = _fail_cleanly(lambda: diff_runs(run_a, run_b), debug=debug)
    typer.echo(render_diff(result))


@app.command()
def validate(
    study: StudyArg,
    reference: Annotated[Path, typer.Option(help="Reference standard (CSV or Parquet).")],
    extract: Annotated[str | None, typer.Option(help=EXTRACT_HELP)] = None,
    coverage: Annotated[
        str | None,
        typer.Option(
            help="Which patients the reference covers: 'reviewed' (only those listed count) or "
            "'complete' (every patient; unlisted ones are negatives). Or '# coverage: ...' in "
            "the file."
        ),
    ] = None,
    sampling: Annotated[
        str | None,
        typer.Option(
            help="How a reviewed sample was drawn: 'simple', or 'by_definition' (separately "
            "among the definition's positives and negatives: sensitivity and specificity are "
            "corrected for verification bias). Or '# sampling: ...' in the file."
        ),
    ] = None,
    debug: DebugOpt = False,
) -> None:
    """Compare each outcome's definition with a reference standard: sensitivity, PPV, kappa.

    Writes nothing; prints one suppressed table per outcome.

    Example: ascertain validate definitions/studies/orvane_multimorbidity.yaml --reference
    chart_review.csv
    """

    def run() -> str:
        # Imported here: it loads scipy (half a second), which no other command needs.
        from pipeline.workflows.validate import render_validation, validate_study

        results = validate_study(
            study, reference, extract=extract_arg(extract), coverage=coverage, sampling=sampling
        )
        threshold = load_study(study).study.output.small_cell_threshold
        return render_validation(results, threshold)

    typer.echo(_fail_cleanly(run, debug=debug))


@app.command()
def report(
    output: Annotated[Path, typer.Argument(help="An output folder written by build.")],
    study: Annotated[
        Path | None,
        typer.Option(help="The study file (default: where the manifest says, from OUTPUT_DIR)."),
    ] = None,
    debug: DebugOpt = False,
) -> None:
    """Write report.html and suppressed summary tables (summary/*.csv) for an output folder.

    Writes report.html, summary/*.csv and ascertain-report.json into OUTPUT_DIR.

    Example: ascertain report output/orvane_multimorbidity
    """
    # Imported here: it loads scipy (half a second), which no other command needs.
    from pipeline.outputs.report import write_report

    files = _fail_cleanly(lambda: write_report(output, study), debug=debug)
    for path in files:
        typer.echo(str(path))


@app.command()
def profile(
    extract: Annotated[
        str, typer.Argument(help="The extract folder, mapping file or connection URI to look at.")
    ],
    out: Annotated[Path, typer.Option(help="Where to write profile.json and .html.")] = Path(
        "profile"
    ),
    threshold: Annotated[
        int, typer.Option(min=1, help="Fewest values of a measure whose percentiles are shown.")
    ] = 5,
    debug: DebugOpt = False,
) -> None:
    """Summarise an extract: rows, dates, orphans, codes, measures and units (patient-level).

    Writes profile.json, profile.html and ascertain-profile.json into --out, and prints a
    table per extract table.

    Example: ascertain profile synthetic_extract --out profile/orvane
    """
    source = as_extract(extract)
    _fail_cleanly(lambda: check_profile_folder(source, out), debug=debug)
    result = _fail_cleanly(lambda: profile_extract(source, threshold=threshold), debug=debug)
    console = Console(highlight=False)
    console.print(profile_table(result, f"extract {extract}"))
    for line in profile_notes(result):
        console.print(line, markup=False)
    console.print(result["release"])
    for path in _fail_cleanly(lambda: write_profile(result, out), debug=debug):
        console.print(str(path))


@app.command()
def codes(
    study: StudyArg,
    extract: Annotated[str | None, typer.Option(help=EXTRACT_HELP)] = None,
    out: Annotated[
        Path | None, typer.Option(help="Write the CSVs here (default: the study's output folder).")
    ] = None,
    for_release: Annotated[
        bool, typer.Option("--release", help="Suppress counts below small_cell_threshold.")
    ] = False,
    debug: DebugOpt = False,
) -> None:
    """Audit the codes each evidence of the study matched in the extract (DuckDB).

    Writes codes_*.csv and ascertain-codes.json; prints a table per definition (patient-level).

    Example: ascertain codes definitions/studies/orvane_multimorbidity.yaml --out out/codes
    """
    from pipeline.workflows._codes_files import audit_tables, header, write_audit
    from pipeline.workflows.codes import audit_codes, check_codes_folder

    source = extract_arg(extract)
    folder = _fail_cleanly(lambda: check_codes_folder(study, source, out), debug=debug)
    audit = _fail_cleanly(lambda: audit_codes(study, source), debug=debug)
    console = Console(highlight=False, soft_wrap=True)
    console.print(header(audit, for_release=for_release), markup=False)
    if not for_release:  # the terminal tables are exact counts
        for table in audit_tables(audit):
            console.print(table)
    written = _fail_cleanly(
        lambda: write_audit(audit, folder, for_release=for_release), debug=debug
    )
    console.print("\n".join(map(str, written)), markup=False)
