"""The study's ``persontime:`` option: how follow-up is split into cells for rates by band.

The cells are of age, calendar year and time since index (``persontime.parquet``).

Age bands and time-since-index bands are given by their lower bounds in whole years; each band
runs to the day before the next one's lower bound, and the last is open. A band's lower bound is
reached on the birthday (or index anniversary) of that age, by the rule the study uses for age
at index: whole years completed, someone born on 29 February turning a year older on 1 March in
a year without one.
"""

from __future__ import annotations

from collections.abc import Callable
from itertools import pairwise
from pathlib import Path
from typing import Annotated

from pydantic import Field, field_validator

from pipeline.config._base import Model, NonNegativeInt
from pipeline.config._yaml import LocatedDocument
from pipeline.errors import Problem

Bounds = Annotated[tuple[NonNegativeInt, ...], Field(min_length=1, max_length=40)]


def _ascending(bounds: tuple[int, ...]) -> None:
    for low, high in pairwise(bounds):
        if high <= low:
            raise ValueError(f"lower bounds must be strictly ascending ({low} then {high})")


class PersonTime(Model):
    """Which boundaries split each patient's follow-up in ``persontime.parquet``.

    ``age_bands: [40, 50, 60]`` makes the bands 40-49, 50-59 and 60+; the first band's lower
    bound must not be above the youngest age the study's age step admits, so every follow-up
    day belongs to a band (checked at load, :func:`persontime_problems`).
    ``since_index_years: [0, 1, 3]`` makes 0-1, 1-3 and 3+ (years completed since index); it
    must start at 0, since follow-up starts the day after index.
    ``reference_rates`` names a table of each outcome's rates in a reference population
    (relative to the study file; read by :mod:`pipeline.config._reference_rates`), for the
    report's observed and expected events and SMRs.
    """

    age_bands: Bounds
    calendar_year: bool = True
    since_index_years: Bounds | None = None
    reference_rates: Path | None = None

    @field_validator("age_bands")
    @classmethod
    def _ascending_ages(cls, bounds: tuple[int, ...]) -> tuple[int, ...]:
        _ascending(bounds)
        return bounds

    @field_validator("since_index_years")
    @classmethod
    def _from_index(cls, bounds: tuple[int, ...] | None) -> tuple[int, ...] | None:
        if bounds is not None:
            _ascending(bounds)
            if bounds[0] != 0:
                raise ValueError("must start at 0: follow-up starts the day after index")
        return bounds

    @property
    def age_labelled(self) -> tuple[tuple[int, int | None, str], ...]:
        """Each age band as (lower, next lower or None, label ``40-49`` / ``80+``)."""
        return _bands(self.age_bands, lambda low, high: f"{low}-{high - 1}")

    @property
    def since_labelled(self) -> tuple[tuple[int, int | None, str], ...]:
        """Each time-since-index band as (lower, upper or None, label ``0-1`` / ``3+``)."""
        return _bands(self.since_index_years or (), lambda low, high: f"{low}-{high}")


def _bands(
    bounds: tuple[int, ...], label: Callable[[int, int], str]
) -> tuple[tuple[int, int | None, str], ...]:
    uppers: list[int | None] = [*bounds[1:], None]
    return tuple(
        (low, high, f"{low}+" if high is None else label(low, high))
        for low, high in zip(bounds, uppers, strict=True)
    )


def persontime_problems(
    doc: LocatedDocument, persontime: PersonTime | None, ages: list[int]
) -> list[Problem]:
    """Refuse age bands that would leave follow-up days of the cohort in no band.

    Args:
        doc: The study file, to locate the problem.
        persontime: The study's option (None: nothing to check).
        ages: The lower bounds of the study's age eligibility steps.

    Every day must fall in a band, or the days over a patient's cells would not add up to the
    follow-up (the build's accounting check). So the study must admit no one younger than the
    first band: an age step whose lower bound is at least the first band's. That step also
    removes patients without a known birth date, whose age cannot be banded.
    """
    if persontime is None:
        return []
    first = persontime.age_bands[0]
    youngest = max(ages, default=None)
    if youngest is not None and youngest >= first:
        return []
    admitted = "has no age step" if youngest is None else f"admits patients from age {youngest}"
    return [
        doc.problem(
            ("persontime", "age_bands", 0),
            "age-band-gap",
            f"the first age band starts at {first} but the study {admitted}; add an age "
            f"eligibility step starting at {first} or more, or start the bands lower",
            at_value=True,
        )
    ]
