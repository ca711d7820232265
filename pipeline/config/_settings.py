"""Pydantic models of a study's run settings: output folder, engine resources, data quality.

Kept apart from the design models in ``_study.py`` (index, eligibility, covariates, outcomes,
follow-up): these say where and how a build runs and what it refuses, not whom it studies.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Literal, Self

from pydantic import Field, model_validator

from pipeline.config._base import Model, PositiveInt


class Output(Model):
    """Where results go and which counts are too small to show.

    A build whose cohort is empty is refused (exit 2, nothing written, the attrition step that
    removed the last patients named) unless ``allow_empty_cohort: true``: an empty cohort is
    far more often a misread extract or a mistaken design than a finding.
    """

    folder: Path
    small_cell_threshold: PositiveInt = 5
    allow_empty_cohort: bool = False


class EngineSettings(Model):
    """Engine resources; the command line can override them."""

    threads: PositiveInt | None = None
    memory_limit: (
        Annotated[str, Field(pattern=r"^\d+(\.\d+)?\s*(KB|MB|GB|TB|KiB|MiB|GiB|TiB)$")] | None
    ) = None


class AcceptedSetAside(Model):
    """One table and misread-data reason whose share of set-aside rows the study accepts."""

    table: Literal["patients", "encounters", "diagnoses", "prescriptions", "measurements"]
    reason: str

    @model_validator(mode="after")
    def _known_misread_reason(self) -> Self:
        # Imported here: the reasons live beside the stages that give them (compile), which
        # imports this package, so a module-level import would be circular.
        from pipeline.compile._quality import SET_ASIDE_REASONS

        known = sorted(r for r, kind in SET_ASIDE_REASONS.items() if kind.misread)
        kind = SET_ASIDE_REASONS.get(self.reason)
        if kind is None:
            raise ValueError(
                f"unknown reason '{self.reason}'; reasons that can stop a build: {', '.join(known)}"
            )
        if not kind.misread:
            raise ValueError(
                f"'{self.reason}' follows from the study's design and never stops a build; "
                "there is nothing to accept"
            )
        if self.table not in kind.tables:
            raise ValueError(
                f"the quality log never sets {self.table} rows aside as '{self.reason}' "
                f"(only {', '.join(kind.tables)})"
            )
        return self


class QualitySettings(Model):
    """How thoroughly the quality log checks the extract, and how much misread data stops a build.

    ``exact_duplicates: skip`` counts exact duplicate rows as used instead of finding them,
    which spares one grouping of every table (the slowest part of a build at millions of
    patients); the quality log then says that duplicates were not checked, and every copy of a
    row counts as a row of evidence (with ``check`` copies count once).

    ``max_share_set_aside`` (0 to 1, default 0.5): when more than this share of one table's
    rows is set aside for one reason that means misread data (an unreadable date, an orphan
    patient, an unknown code system; ``SET_ASIDE_REASONS`` in ``compile/_quality.py`` says
    which), the build stops before writing anything, because its cohort would silently lack
    those rows. Reasons that follow from the design (after end of data, after death, unknown
    measure, exact duplicate) never stop a build. ``accept_set_aside`` lists the table and
    reason pairs a study accepts whatever their share, e.g.
    ``accept_set_aside: [{table: encounters, reason: unparseable date}]``.
    """

    exact_duplicates: Literal["check", "skip"] = "check"
    max_share_set_aside: Annotated[float, Field(ge=0, le=1)] = 0.5
    accept_set_aside: tuple[AcceptedSetAside, ...] = ()
