"""Refuse a build that ran but whose result would mislead, before anything is written.

A build on a misread extract still "works": every encounter date unreadable, or no event row
matching a patient, gives a cohort of 0 patients (or a cohort missing most of its evidence)
and would replace the previous output. Two checks run after the engine and the row
accounting, before the outputs are written, so a refused build leaves the previous output
untouched:

- per table, no reason that means misread data (``SetAsideReason.misread``) may set aside
  more than the study's ``quality.max_share_set_aside`` of the rows read, unless the study
  lists the table and reason in ``quality.accept_set_aside``;
- the cohort may not be empty unless the study's ``output.allow_empty_cohort`` says so.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import pyarrow as pa

from pipeline.compile._quality import SET_ASIDE_REASONS
from pipeline.config import Study
from pipeline.errors import UnusableBuildError


@dataclass(frozen=True)
class MisreadShare:
    """One table whose rows were set aside for one misread-data reason beyond the limit."""

    table: str
    reason: str
    rows: int
    read: int
    first_file: str | None
    first_row: int | None

    @property
    def share(self) -> float:
        """The share of the table's rows set aside for the reason."""
        return self.rows / self.read


def _percent(share: float) -> str:
    """``100 %``, ``50 %``, ``62.5 %``: one decimal at most, none when it is zero."""
    return f"{100 * share:.1f}".removesuffix(".0") + " %"


def misread_shares(study: Study, read: dict[str, int], quality: pa.Table) -> list[MisreadShare]:
    """The (table, reason) pairs whose share of set-aside rows exceeds the study's limit.

    Args:
        study: The study, for its ``quality`` settings.
        read: Rows read per table (the row accounting's ``read``).
        quality: The quality log with ``first_file`` and ``first_row`` (see
            ``locate_first_rows``).

    Returns:
        The offending pairs in table then reason order, the accepted ones left out.
    """
    settings = study.quality
    accepted = {(a.table, a.reason) for a in settings.accept_set_aside}
    found = []
    for entry in quality.to_pylist():
        table, reason = entry["source_table"], entry["reason"]
        kind = SET_ASIDE_REASONS.get(reason)
        if entry["outcome"] == "used" or kind is None or not kind.misread:
            continue
        n_read = read.get(table, 0)
        if not n_read or (table, reason) in accepted:
            continue
        if entry["n_rows"] / n_read > settings.max_share_set_aside:
            found.append(
                MisreadShare(
                    table,
                    reason,
                    entry["n_rows"],
                    n_read,
                    entry.get("first_file"),
                    entry.get("first_row"),
                )
            )
    return sorted(found, key=lambda m: (m.table, m.reason))


def describe_misread(found: MisreadShare, limit: float) -> str:
    """One finding as a sentence: what, how many, where first, the limit, the fix, the waiver."""
    where = (
        f" (first at {found.first_file} row {found.first_row:,})"
        if found.first_file is not None and found.first_row is not None
        else ""
    )
    hint = SET_ASIDE_REASONS[found.reason].hint
    return (
        f"{found.table}: {found.rows:,} of {found.read:,} rows ({_percent(found.share)}) set "
        f'aside as "{found.reason}"{where}; more than the study\'s limit of {_percent(limit)}. '
        f"Likely cause: {hint} To accept this, add "
        f"{{table: {found.table}, reason: {found.reason}}} to accept_set_aside in the study's "
        "quality section."
    )


PRE_POPULATION_STEPS = ("patients_in_extract", "without_index_date")


def _emptied_by(attrition: list[dict[str, Any]]) -> str:
    """Which attrition step removed the last patients, as a phrase."""
    # The lines before the source population (the extract, without an index date) come first.
    steps = [s for s in attrition if s["step"] not in PRE_POPULATION_STEPS]
    first = steps[0] if steps else None
    if first is None or not first["remaining"]:
        described = f" ({first['description']})" if first and first.get("description") else ""
        return f"the source population is already empty{described}"
    for step in steps[1:]:
        if not step["remaining"]:
            return (
                f"step '{step['step']}' ({step['description']}) removed the last "
                f"{step['removed']:,} of {step['patients_before']:,} patients"
            )
    return "no attrition step left it empty, yet the analysis table has no rows"


def check_usable(
    study: Study,
    read: dict[str, int],
    quality: pa.Table,
    attrition: pa.Table,
    cohort_rows: int,
) -> None:
    """Refuse a build whose extract was likely misread or whose cohort is empty.

    Called by the build after the row accounting and before anything is written.

    Args:
        study: The study, for its ``quality`` and ``output`` settings.
        read: Rows read per table.
        quality: The quality log with ``first_file`` and ``first_row``.
        attrition: The attrition log (``step``, ``description``, ``patients_before``,
            ``removed``, ``remaining``), in step order.
        cohort_rows: Rows of the analysis table.

    Raises:
        UnusableBuildError: Misread data beyond the study's limit, or an empty cohort the
            study does not allow; the message says which, where, and what to do.
    """
    limit = study.quality.max_share_set_aside
    found = misread_shares(study, read, quality)
    if found:
        lines = [describe_misread(f, limit) for f in found]
        raise UnusableBuildError(
            "the extract looks misread, so nothing was written:\n" + "\n".join(lines)
        )
    if cohort_rows == 0 and not study.output.allow_empty_cohort:
        steps = sorted(attrition.to_pylist(), key=lambda s: s.get("step_number", 0))
        raise UnusableBuildError(
            f"the cohort is empty: {_emptied_by(steps)}; nothing was written. Check the "
            "quality log of a build with allow_empty_cohort: true in the study's output "
            "section, or set it there if an empty cohort is a valid result."
        )
