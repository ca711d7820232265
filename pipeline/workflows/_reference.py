"""The reference standard of ``ascertain validate``: reading and checking the reference file.

A reference lists patients whose true status is known, one row per patient and condition, and
declares which patients it covers:

- ``coverage: complete``: it speaks for every patient of the extract (synthetic ground truth):
  a patient without a row for a condition is a true negative.
- ``coverage: reviewed``: it lists the patients that were reviewed (a chart-review sample);
  patients without a row are left out of every count and denominator.

and, for a reviewed sample, how it was drawn:

- ``sampling: simple``: independently of the definition (or everyone reviewed);
- ``sampling: by_definition``: separately among the definition's positives and negatives (say
  100 of each); sensitivity and specificity are then corrected for verification bias.

Two layouts are read, CSV or Parquet: ``patient_id, condition, status[, date]`` (status one of
:data:`POSITIVE` or :data:`NEGATIVE`, any case) and the synthetic ground truth
``patient_id, condition, true_onset_date`` (a date means a case; ``coverage`` defaults to
``complete`` for it). A CSV file declares ``coverage`` and ``sampling`` in ``# key: value``
lines before its header; the command line can declare them too, for any file.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import polars as pl

from pipeline.errors import AscertainError

__all__ = ["NEGATIVE", "POSITIVE", "Reference", "read_reference"]

Coverage = Literal["complete", "reviewed"]
Sampling = Literal["simple", "by_definition"]

POSITIVE = ("1", "true", "yes", "case")
"""Status values that mean the reference calls the patient a case (compared in lower case)."""
NEGATIVE = ("0", "false", "no", "non-case")
"""Status values that mean the reference calls the patient no case."""

_DECLARED = {"coverage": ("complete", "reviewed"), "sampling": ("simple", "by_definition")}


@dataclass(frozen=True)
class Reference:
    """A checked reference: one row per patient and condition, and what it covers.

    Attributes:
        rows: ``patient_id`` (text), ``condition``, ``status`` (bool), ``date`` (Date or null)
            and ``line`` (where the row is in the file, for messages).
        coverage: ``complete`` or ``reviewed``.
        sampling: ``simple`` or ``by_definition``.
        where: How rows are located in messages: ``line`` (CSV) or ``row`` (Parquet).
    """

    rows: pl.DataFrame
    coverage: Coverage
    sampling: Sampling
    where: str = "line"


def _header(path: Path) -> tuple[dict[str, tuple[str, int]], int]:
    """The ``# key: value`` lines before a CSV header, and how many lines they take."""
    declared: dict[str, tuple[str, int]] = {}
    skipped = 0
    with path.open(encoding="utf-8") as handle:
        for number, line in enumerate(handle, start=1):
            text = line.strip()
            if not text.startswith("#"):
                break
            skipped = number
            body = text.lstrip("#").strip()
            if not body:
                continue
            key, sep, value = (part.strip() for part in body.partition(":"))
            if not sep or key not in _DECLARED:
                raise AscertainError(
                    f"{path}:{number}: a comment line before the header declares "
                    f"'coverage: ...' or 'sampling: ...', got {body!r}"
                )
            if value not in _DECLARED[key]:
                raise AscertainError(
                    f"{path}:{number}: {key} must be one of {', '.join(_DECLARED[key])}, "
                    f"got {value!r}"
                )
            declared[key] = (value, number)
    return declared, skipped


def _settle(
    path: Path, key: str, in_file: tuple[str, int] | None, given: str | None, default: str | None
) -> str:
    if in_file and given and in_file[0] != given:
        raise AscertainError(
            f"{path}:{in_file[1]}: the file declares {key} {in_file[0]}, the command line "
            f"{given}; give it once"
        )
    chosen = given or (in_file[0] if in_file else default)
    if chosen is None:
        raise AscertainError(
            f"{path}: declare the reference's coverage: 'reviewed' when it lists only the "
            "patients that were reviewed (the others are left out of every count), 'complete' "
            "when it speaks for every patient of the extract (a patient without a row is a "
            "negative); as a first line '# coverage: reviewed' or with --coverage"
        )
    if chosen not in _DECLARED[key]:
        raise AscertainError(f"{key} must be one of {', '.join(_DECLARED[key])}, got {chosen!r}")
    return chosen


def _dates(path: Path, frame: pl.DataFrame, column: str, where: str) -> pl.Series:
    text = frame[column].cast(pl.String).str.strip_chars()
    text = pl.Series(column, [None if t in (None, "") else t for t in text.to_list()], pl.String)
    parsed = text.str.to_date("%Y-%m-%d", strict=False)
    bad = frame.filter(parsed.is_null() & text.is_not_null())
    if bad.height:
        r = bad.row(0, named=True)
        raise AscertainError(
            f"{path}:{where} {r['line']}: {column} {r[column]!r} of patient {r['patient_id']} is "
            "not a date (YYYY-MM-DD)"
        )
    return parsed


def read_reference(
    path: Path, *, coverage: str | None = None, sampling: str | None = None
) -> Reference:
    """Read and check a reference file (see the module docstring for its format).

    Args:
        path: The CSV or Parquet file.
        coverage: ``complete`` or ``reviewed`` from the command line, if given.
        sampling: ``simple`` or ``by_definition`` from the command line, if given.

    Returns:
        The rows with their coverage and sampling design.

    Raises:
        AscertainError: An unreadable file; columns of neither layout; a status outside the
            documented values, a bad date, a missing patient id or a repeated patient and
            condition (each naming its line or row); no coverage declared for a status file;
            contradicting declarations; ``by_definition`` sampling of a complete reference.
    """
    declared: dict[str, tuple[str, int]] = {}
    parquet = path.suffix == ".parquet"
    try:
        if parquet:
            frame, first = pl.read_parquet(path), 1
        else:
            declared, skipped = _header(path)
            frame = pl.read_csv(path, skip_rows=skipped, infer_schema_length=0)
            first = skipped + 2  # the header line, then the first row
    except (OSError, UnicodeDecodeError, pl.exceptions.PolarsError) as err:
        raise AscertainError(f"{path}: cannot read the reference: {err}") from err
    where = "row" if parquet else "line"
    columns = set(frame.columns)
    frame = frame.with_row_index("line", offset=first)
    truth = {"patient_id", "condition", "true_onset_date"} <= columns
    if not truth and not {"patient_id", "condition", "status"} <= columns:
        raise AscertainError(
            f"{path}: a reference needs columns patient_id, condition and status (optionally "
            "date), or patient_id, condition and true_onset_date; found: "
            f"{', '.join(c for c in frame.columns if c != 'line')}"
        )
    frame = frame.with_columns(
        pl.col("patient_id").cast(pl.String).str.strip_chars(),
        pl.col("condition").cast(pl.String).str.strip_chars(),
    )
    blank = frame.filter(pl.col("patient_id").is_null() | (pl.col("patient_id") == ""))
    if blank.height:
        raise AscertainError(f"{path}:{where} {blank['line'][0]}: the patient_id is empty")
    if truth:
        date = _dates(path, frame, "true_onset_date", where)
        status = date.is_not_null()
    else:
        date = (
            _dates(path, frame, "date", where)
            if "date" in columns
            else pl.Series("date", [None] * frame.height, pl.Date)
        )
        text = frame["status"].cast(pl.String).str.strip_chars().str.to_lowercase()
        unknown = frame.filter(~text.is_in([*POSITIVE, *NEGATIVE]) | text.is_null())
        if unknown.height:
            r = unknown.row(0, named=True)
            raise AscertainError(
                f"{path}:{where} {r['line']}: status {r['status']!r} of patient "
                f"{r['patient_id']} is not one of {'/'.join(POSITIVE)} (a case) or "
                f"{'/'.join(NEGATIVE)} (no case)"
            )
        status = text.is_in(POSITIVE)
    rows = frame.select(
        "patient_id",
        "condition",
        status.alias("status"),
        date.alias("date"),
        "line",
    )
    repeated = rows.filter(pl.struct("patient_id", "condition").is_duplicated())
    if repeated.height:
        r = repeated.row(1, named=True)
        raise AscertainError(
            f"{path}:{where} {r['line']}: patient {r['patient_id']} has a second row for "
            f"{r['condition']} (first at {where} {repeated['line'][0]})"
        )
    chosen = _settle(
        path, "coverage", declared.get("coverage"), coverage, "complete" if truth else None
    )
    design = _settle(path, "sampling", declared.get("sampling"), sampling, "simple")
    if chosen == "complete" and design == "by_definition":
        raise AscertainError(
            f"{path}: sampling by_definition describes a reviewed sample; a complete reference "
            "covers every patient"
        )
    return Reference(rows, chosen, design, where)  # type: ignore[arg-type]
