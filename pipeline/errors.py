"""The project's exception tree.

Every error a user can cause derives from :class:`AscertainError`, so the CLI can print it as one
plain message and exit 2 instead of showing a traceback::

    AscertainError
    ├── ConfigError     a study or condition file is unreadable or inconsistent (file:line:col)
    ├── ExtractError    the extract is missing a table or column, or cannot be read
    ├── EngineError     the engine refused a plan or a data check failed while running it
    ├── UnusableBuildError  the build ran but its result would mislead (misread data, no cohort)
    └── OutputFolderError  an output folder holds files the tool did not write, or overlaps
                        an input (the extract, the study): the command refuses, touching nothing
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path


class AscertainError(Exception):
    """Base class of every error the tool reports to a user."""


@dataclass(frozen=True, order=True)
class Problem:
    """One located problem in a configuration file.

    Attributes:
        file: The file at fault.
        line: 1-based line, 0 when the problem concerns the whole file.
        column: 1-based column, 0 when unknown.
        code: A stable short identifier, e.g. ``unknown-key``.
        message: One plain sentence.
    """

    file: Path
    line: int
    column: int
    code: str
    message: str

    def __str__(self) -> str:
        where = str(self.file)
        if self.line:
            where += f":{self.line}:{self.column}" if self.column else f":{self.line}"
        return f"{where} [{self.code}] {self.message}"


class ConfigError(AscertainError):
    """One or more problems in study or condition files, each with its location."""

    def __init__(self, problems: list[Problem]) -> None:
        self.problems = sorted(problems)
        super().__init__("\n".join(str(p) for p in self.problems))


class _LocatedError(AscertainError):
    """An error with a stable short code and, where known, the file, table or stage at fault.

    The code lets a user (or a script) tell failures apart without parsing the sentence; the
    place comes first, as in a :class:`Problem`, so every error reads the same way. An error
    raised without a code prints its sentence alone (and carries the class's default code).
    """

    default_code = "error"

    def __init__(self, message: str, *, code: str | None = None, where: str | None = None) -> None:
        self.message = message
        self.code = code or self.default_code
        self.where = where
        prefix = f"{where} " if where else ""
        tag = f"[{code}] " if code else ""
        super().__init__(f"{prefix}{tag}{message}")


class ExtractError(_LocatedError):
    """The extract cannot be used: a missing table, a missing column, an unreadable file."""

    default_code = "extract-unusable"


class EngineError(_LocatedError):
    """The engine failed to run a plan, or a data check in the plan found offending rows."""

    default_code = "engine-failed"


class UnusableBuildError(AscertainError):
    """A build ran but its result would mislead, so nothing was written.

    Raised when more than the study's share of a table's rows is set aside for a reason that
    means the extract was misread, or when the cohort is empty and the study does not allow it.
    """


class OutputFolderError(AscertainError):
    """An output folder cannot be written without touching files the tool did not write there.

    Raised before any work is done: the folder holds foreign files, is a file, is or lies
    inside an input, or holds one (see :mod:`pipeline.outputs._ownership`).
    """
