"""The analysis table's generated column names, checked once at load: no two may meet.

Outcomes, covariates, the exposure section and as-treated follow-up each add columns named
from the study's own names. Two names from different places can spell the same column: a
covariate ``time_hf`` and the outcome ``hf``'s ``time_hf``, or an outcome ``hf_as_treated``
whose ``incident_hf_as_treated`` is also the outcome ``hf``'s as-treated column. A table cannot
hold both, and a build would fail deep in the engine or silently keep one; so every clash is
refused here, at the line of the name that comes second, with the stable code
``duplicate-column``.
"""

from __future__ import annotations

from pipeline.compile import names
from pipeline.config._study import RESERVED_COLUMNS, Study
from pipeline.config._yaml import LocatedDocument, PathKey
from pipeline.errors import Problem

__all__ = ["column_clashes", "generated_columns"]

FOLLOWUP_COLUMNS = names.FOLLOWUP_COLUMNS

# Analysis-table columns the exposure section adds (the group started on the index date).
_EXPOSURE_COLUMNS = (names.EXPOSURE,)


def _as_treated(column: str) -> str:
    return f"{column}{names.AS_TREATED_SUFFIX}"


def generated_columns(study: Study) -> list[tuple[PathKey, str, tuple[str, ...]]]:
    """Every column the study's names make, in table order, with who makes it.

    Returns:
        (where in the study file the maker is, what the maker is in words, its columns); the
        fixed columns come first with an empty path.
    """
    exposure = study.exposure
    as_treated = exposure is not None and exposure.as_treated
    made: list[tuple[PathKey, str, tuple[str, ...]]] = [
        ((), "the analysis table", (*RESERVED_COLUMNS, *FOLLOWUP_COLUMNS))
    ]
    if exposure is not None:
        made.append((("exposure",), "the exposure section", _EXPOSURE_COLUMNS))
        if as_treated:
            followup = tuple(_as_treated(c) for c in FOLLOWUP_COLUMNS)
            made.append((("exposure", "as_treated"), "as-treated follow-up", followup))
    for i, outcome in enumerate(study.outcomes.conditions):
        columns = names.outcome_columns(outcome)
        own: tuple[str, ...] = columns.all()
        if as_treated:
            own += tuple(_as_treated(c) for c in (columns.incident, columns.time, columns.event))
        made.append((("outcomes", "conditions", i), f"outcome '{outcome}'", own))
    for name, cov in study.covariates.items():
        # (the _derived column exists only for derivable measures; reserving it always is safe)
        own = (name, f"{name}_date", f"{name}_derived") if cov.latest else (name,)
        made.append((("covariates", name), f"covariate '{name}'", own))
    return made


def column_clashes(doc: LocatedDocument, study: Study) -> list[Problem]:
    """A located ``duplicate-column`` problem for each maker whose column another made first.

    Args:
        doc: The study file, for locations.
        study: The parsed study.

    Returns:
        One problem per clashing maker, at its own line, naming the columns and their first
        maker; empty when every column name is made once.
    """
    first: dict[str, str] = {}
    problems = []
    for path, what, columns in generated_columns(study):
        clash = [c for c in columns if c in first]
        if clash and path:
            owners = ", ".join(dict.fromkeys(first[c] for c in clash))
            problems.append(
                doc.problem(
                    path,
                    "duplicate-column",
                    f"{what} makes column(s) {', '.join(clash)}, which {owners} already makes; "
                    "rename one of them",
                )
            )
        for c in columns:
            first.setdefault(c, what)
    return problems
