"""The study's ``exposure:`` section: new users of one of several treatment groups.

A new-user (active-comparator) study compares patients who start one treatment with patients
who start another. Each group is a piece of evidence, usually a prescription of a drug class
by ATC code. The index strategy ``index: {exposure_start: {between: [...]}}`` dates each
patient on the first record of any group in that window; two eligibility steps, put before the
study's own, keep only new users (no record of any group in the ``washout_days`` days before
index) and patients who started one group only (a record of two groups on the index day is
no choice between them). The cohort's ``exposure`` column names the group. The compiler's side
is ``pipeline/compile/_exposure.py``.
"""

from __future__ import annotations

from typing import Annotated, Self

from pydantic import Field, field_validator, model_validator

from pipeline.config._base import Model, Name, NonNegativeInt
from pipeline.config._condition import Evidence
from pipeline.config._yaml import LocatedDocument
from pipeline.errors import Problem


class Episodes(Model):
    """How prescriptions of a group join into treatment episodes (``episodes.parquet``).

    A prescription covers its days from ``start_date`` to ``stop_date``, both included; one
    without a usable stop date (and a diagnosis group's record) covers
    ``cover_without_stop_days`` days from its date. Prescriptions of one group join into one
    episode while each starts at most ``grace_days`` days after the cover so far ends (a gap of
    exactly ``grace_days`` uncovered days joins). Stockpiling: days that overlap are counted
    once; an early refill's overlap is not carried forward past the later prescription's end.

    Attributes:
        grace_days: The longest gap of uncovered days that still joins two prescriptions.
        cover_without_stop_days: Days one prescription without a stop date covers.
    """

    grace_days: NonNegativeInt
    cover_without_stop_days: Annotated[int, Field(ge=1, le=3650)]


class Exposure(Model):
    """The treatment groups compared, and how long a new user must have been without any.

    Attributes:
        groups: Group name -> the evidence that shows the group was started (a prescription,
            or a diagnosis such as a procedure code), codes written inline.
        washout_days: A patient with a record of any group on one of the this many days before
            the index date is a prevalent user, not a new user (0: no washout).
        episodes: Optional: write each cohort patient's treatment episodes from the index date
            on (``episodes.parquet``).
        as_treated: Also follow each patient as treated (cohort columns ``*_as_treated``):
            follow-up also ends when the first episode of the group started ends, plus the
            grace period (discontinued), or on the first record of another group (a switch or
            an add-on). Needs ``episodes``.
    """

    groups: Annotated[dict[Name, Evidence], Field(min_length=1)]
    washout_days: NonNegativeInt = 365
    episodes: Episodes | None = None
    as_treated: bool = False

    @model_validator(mode="after")
    def _as_treated_needs_episodes(self) -> Self:
        if self.as_treated and self.episodes is None:
            raise ValueError(
                "as_treated follow-up ends at the end of a treatment episode: add episodes: "
                "with grace_days and cover_without_stop_days"
            )
        return self

    @field_validator("groups")
    @classmethod
    def _coded_evidence(cls, value: dict[str, Evidence]) -> dict[str, Evidence]:
        for name, evidence in value.items():
            if evidence.prescription is None and evidence.diagnosis is None:
                raise ValueError(
                    f"group {name}: an exposure group is a prescription or a diagnosis "
                    f"(got {evidence.kind})"
                )
        return value


def exposure_problems(
    doc: LocatedDocument,
    exposure: Exposure | None,
    strategy: str,
) -> list[Problem]:
    """Refuse an exposure section and an index strategy that do not go together.

    The columns the section adds are checked against every other generated column by
    :func:`pipeline.config._columns.column_clashes`.

    Args:
        doc: The study file, to locate each problem.
        exposure: The study's section (None when absent).
        strategy: The study's index strategy key.
    """
    problems: list[Problem] = []
    if exposure is None and strategy == "exposure_start":
        problems.append(
            doc.problem(
                ("index", "exposure_start"),
                "missing-exposure",
                "index exposure_start dates patients on their first treatment of an exposure "
                "group; add an exposure: section with the groups",
            )
        )
    if exposure is not None and strategy != "exposure_start":
        problems.append(
            doc.problem(
                ("exposure",),
                "exposure-index",
                f"an exposure: section needs index exposure_start (the study indexes by "
                f"{strategy}); new users are dated on their first treatment",
            )
        )
    return problems


def exposure_text(exposure: Exposure) -> str:
    """One sentence on the design, for ``check --explain``."""
    groups = ", ".join(exposure.groups)
    text = (
        f" New users of one of {groups}: before the eligibility steps above, a record of any "
        f"group on the {exposure.washout_days} days before index excludes a patient "
        "(new_user), and so does a record of two groups on the index day (one_exposure_group); "
        "cohort column exposure."
    )
    if exposure.episodes is not None:
        rule = exposure.episodes
        text += (
            f" Treatment episodes (episodes.parquet) join records of a group at most "
            f"{rule.grace_days} uncovered days apart; a prescription without a stop date "
            f"covers {rule.cover_without_stop_days} days."
        )
    if exposure.as_treated:
        text += (
            " As treated (*_as_treated columns), follow-up also ends at the end of the first "
            "episode plus the grace days, or at a record of another group."
        )
    return text
