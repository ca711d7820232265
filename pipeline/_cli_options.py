"""The command line's shared argument types, help texts and progress display.

Kept apart from ``cli.py`` so the command module stays short; nothing here prints.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Annotated, TypeVar

import typer
from rich.console import Console
from rich.markup import escape
from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

from pipeline.compile import Stage
from pipeline.errors import AscertainError
from pipeline.extract import as_extract

T = TypeVar("T")

StudyArg = Annotated[
    Path, typer.Argument(help="The study file (YAML).", exists=False, dir_okay=False)
]
DebugOpt = Annotated[bool, typer.Option("--debug", help="Show the full traceback on errors.")]
SHAPES_HELP = "Reshape the data (repeatable): value_text, integer_ids, many_practices, messy, wide."
EXTRACT_HELP = (
    "Use this extract instead of the study's: a folder, a site mapping file, a file:// URI, a "
    "folder on a Hadoop file system (hdfs://, s3a://; --engine spark), or a database URI "
    "postgresql://USER@HOST:PORT/DATABASE?schema=S (password from PGPASSWORD or ~/.pgpass)."
)


def extract_arg(text: str | None) -> Path | str | None:
    """An ``--extract`` value as a path or a URI (None: the study's own)."""
    return None if text is None else as_extract(text)


SparkMasterOpt = Annotated[
    str | None,
    typer.Option(help="Spark master URL: local[*] (default), spark://HOST:PORT, yarn, k8s://URL."),
]
SparkConfOpt = Annotated[
    list[str] | None,
    typer.Option(help="A Spark setting KEY=VALUE (repeatable); beats the study's spark: section."),
]


@contextmanager
def progress_display(*, quiet: bool) -> Iterator[Callable[[Stage, int, int], None] | None]:
    """A spinner naming the running stage on a terminal's stderr; nothing when quiet or piped."""
    if quiet or not sys.stderr.isatty():
        yield None
        return
    columns = (SpinnerColumn(), TextColumn("{task.description}"), TimeElapsedColumn())
    with Progress(*columns, console=Console(stderr=True), transient=True) as progress:
        task = progress.add_task("starting", total=None)

        def on_stage(stage: Stage, number: int, total: int) -> None:
            progress.update(task, description=f"stage {number}/{total}: {stage.name}")

        yield on_stage


def fail_cleanly(action: Callable[[], T], *, debug: bool) -> T:
    """Run one library call; a user's error is printed as one message and exits 2.

    Raises:
        typer.Exit: With status 2 after printing the error (unless ``debug``).
    """
    try:
        return action()
    except (AscertainError, OSError) as err:
        # OSError: a folder that cannot be created or read, a full disk. Writes are staged, so
        # nothing was written; a traceback's exit status (1) would read as a negative answer.
        if debug:
            raise
        # escape(): the message's "[unknown-key]" codes are text, not console markup.
        Console(stderr=True, highlight=False, soft_wrap=True).print(
            f"[bold red]error:[/] {escape(str(err))}", markup=True
        )
        raise typer.Exit(2) from None
