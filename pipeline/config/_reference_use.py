"""Reading a study's reference rate table when the study is loaded.

Kept apart from the loader so the loader only asks for it: the path is resolved against the
study's folder, the file read and checked line by line
(:func:`pipeline.config._reference_rates.read_reference_rates`) and against the study
(:func:`~pipeline.config._reference_rates.coverage_problems`), all before anything is built.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

from pipeline.config._reference_rates import (
    ReferenceRates,
    read_reference_rates,
    stratum_label,
)
from pipeline.config._study import Study
from pipeline.config._yaml import LocatedDocument
from pipeline.errors import ConfigError, Problem

__all__ = ["coverage_problems", "study_reference_rates", "years_of_followup"]


def study_reference_rates(
    doc: LocatedDocument, study: Study, base: Path
) -> tuple[Study, ReferenceRates | None]:
    """The study with its table's path resolved, and the table (None when it names none).

    Args:
        doc: The study file, to locate problems.
        study: The validated study.
        base: The study file's folder (the table's path is relative to it).

    Raises:
        ConfigError: The file is missing, has bad lines (named by its file, line and column),
            or leaves a band of the cohort without a rate (located in the study file).
    """
    persontime = study.persontime
    if persontime is None or persontime.reference_rates is None:
        return study, None
    path = (base / persontime.reference_rates).resolve()
    if not path.is_file():
        raise ConfigError(
            [
                doc.problem(
                    ("persontime", "reference_rates"),
                    "missing-file",
                    f"the reference rate table {persontime.reference_rates} is not there (the path "
                    "is relative to the study file)",
                    at_value=True,
                )
            ]
        )
    table = read_reference_rates(path)
    problems = coverage_problems(doc, study, table)
    if problems:
        raise ConfigError(problems)
    resolved = persontime.model_copy(update={"reference_rates": path})
    return study.model_copy(update={"persontime": resolved}), table


def years_of_followup(first_index: dt.date, end_of_data: dt.date) -> range:
    """The calendar years follow-up can reach: from the day after the first index to the end."""
    return range((first_index + dt.timedelta(days=1)).year, end_of_data.year + 1)


def _unknown_outcomes(table: ReferenceRates, outcomes: list[str]) -> list[Problem]:
    """An outcome of the table the study does not have, at its first line (a likely typo)."""
    problems = []
    for outcome in table.outcomes:
        if outcome not in outcomes:
            line = min(
                b.line for s, bands in table.strata.items() if s[0] == outcome for b in bands
            )
            problems.append(
                Problem(
                    table.file,
                    line,
                    1,
                    "rates-unknown-outcome",
                    f"'{outcome}' is not an outcome of the study ({', '.join(outcomes)})",
                )
            )
    return problems


def _strata(study: Study, table: ReferenceRates) -> tuple[list[str | None], list[int | None], str]:
    """The sexes and years the cohort's person-time can fall in, or why they are unknown."""
    persontime = study.persontime
    assert persontime is not None  # only called for a study with a reference table
    sexes: list[str | None] = [None]
    years: list[int | None] = [None]
    if table.by_sex:
        admitted = next((c.sex for c in study.eligibility if c.sex is not None), None)
        if admitted is None:
            return (
                [],
                [],
                (
                    "the reference rates are by sex but the study admits any sex; add a sex "
                    "eligibility step (e.g. sex: [F, M]) so every patient has a rate"
                ),
            )
        sexes = list(admitted)
    if table.by_year:
        if not persontime.calendar_year:
            return (
                [],
                [],
                (
                    "the reference rates are by calendar year but persontime has "
                    "calendar_year: false; set it to true to split follow-up by year"
                ),
            )
        years = list(years_of_followup(study.index.possible[0], study.end_of_data))
    return sexes, years, ""


def coverage_problems(doc: LocatedDocument, study: Study, table: ReferenceRates) -> list[Problem]:
    """Refuse a table that names no outcome of the study or leaves a band of the cohort uncovered.

    The cohort's person-time falls in the study's age bands, in the sexes its sex step admits
    and in the calendar years from the day after the first possible index to the end of data;
    every such cell of an outcome the table names must lie in one band of the table, or its
    expected count would be unknown. Checked when the study is loaded, so ``check`` and
    ``build`` refuse it before anything runs; each problem names the band, the stratum and the
    table. Outcomes the table does not name get no SMR (the report says so).

    Args:
        doc: The study file, to locate the problems at ``persontime: reference_rates:``.
        study: The study (with ``persontime`` set).
        table: Its reference rate table.
    """
    persontime = study.persontime
    assert persontime is not None  # only called for a study with a reference table

    def problem(message: str) -> Problem:
        return doc.problem(
            ("persontime", "reference_rates"),
            "rates-not-covered",
            f"{message} (table {table.file.name})",
            at_value=True,
        )

    outcomes = list(study.outcomes.conditions)
    problems = _unknown_outcomes(table, outcomes)
    sexes, years, why = _strata(study, table)
    if why:
        return [*problems, problem(why)]
    bands = [(low, None if high is None else high - 1, label)
             for low, high, label in persontime.age_labelled]  # fmt: skip
    strata = [(o, s, y) for o in table.outcomes if o in outcomes for s in sexes for y in years]
    for stratum in strata:
        missing = [label for low, high, label in bands if not table.rate(*stratum, (low, high))]
        if missing:
            problems.append(
                problem(
                    f"the age band {missing[0]} of the study has no rate for "
                    f"{stratum_label(stratum)}: no band of the reference table holds it whole"
                    + (f" (nor {', '.join(missing[1:])})" if missing[1:] else "")
                )
            )
        if len(problems) >= 20:  # enough to see the pattern
            break
    return problems
