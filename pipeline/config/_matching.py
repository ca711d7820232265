"""The study's ``matching:`` option: controls for the cases of an outcome or new users of a group.

Sets are opened by one of two kinds of patient in the cohort (exactly one of the two keys):

- ``cases_of: OUTCOME``: each incident case of the outcome, dated on its onset;
- ``exposed_in: GROUP`` (a new-user study only): each patient who started that exposure
  group, dated on their index date (the first record of the group).

That date is the set's date. Up to ``controls_per_case`` controls are drawn for it by
incidence-density sampling: patients of the same sex, born within ``birth_year_within`` years
(and, with ``same_practice``, registered at the same practice) who are eligible on the set's
date in the pool ``controls_from`` names:

- ``cohort`` (the default for case sets): the cohort's patients under follow-up, in contact
  and free of the outcome on the set's date;
- ``source_population`` (the only pool for exposed sets, since every patient of a new-user
  cohort is exposed): the extract's usable patients (``patient_base``) registered on the
  set's date (registration date, when recorded, on or before it; no deregistration before
  it), alive on it, in contact, and free of the outcome (no onset on or before the set's
  date, over the whole history) or, for exposed sets, not yet exposed (no record of ANY
  exposure group on or before the set's date) and free of every outcome of the study (no
  onset of any of ``outcomes.conditions`` on or before it, over the whole history).

"Any group", not only the set's own: a patient already treated with the comparator is not an
untreated control, and counting only the set's group would let comparator users stand for the
unexposed. A control may become a case, or exposed, later, even the next day.

The draw is by a hash of (``seed``, set's patient, candidate), so the same study and extract
always give the same sets, on every engine. The compiler's side is
``pipeline/compile/_matching.py``.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field

from pipeline.config._base import Model, Name
from pipeline.config._yaml import LocatedDocument
from pipeline.errors import Problem

CONTROL_POOLS = ("cohort", "source_population")
"""The values of ``controls_from``: where controls come from."""


class Matching(Model):
    """How controls are drawn for the cases of one outcome, or for new users of one group.

    Attributes:
        cases_of: The outcome (one of ``outcomes.conditions``) whose incident cases open sets.
        exposed_in: Instead of ``cases_of``: the exposure group (of ``exposure.groups``) whose
            new users in the cohort open sets, dated on their index date.
        controls_from: The pool controls come from: ``cohort`` (the default with
            ``cases_of``) or ``source_population`` (the extract's patients; the default, and
            the only pool, with ``exposed_in``). See the module docstring.
        controls_per_case: The most controls a set receives.
        birth_year_within: A control's birth year differs from the case's by at most this.
        same_practice: Controls come from the case's practice only.
        reuse_controls: True draws with replacement: a patient may be a control in several
            sets. False (the default) gives each patient at most one set as a control, filling
            sets in order of set date, then case id.
        seed: Chooses the draw; another seed gives other (equally valid) sets.
        contact_within_days: In contact on the set's date means a contact with the practice
            (as ``followup.contact`` counts contacts) on one of the this many days before it,
            or on the day itself.
    """

    cases_of: Name | None = None
    exposed_in: Name | None = None
    controls_from: Literal["cohort", "source_population"] | None = None
    controls_per_case: Annotated[int, Field(ge=1, le=50)]
    birth_year_within: Annotated[int, Field(ge=0, le=10)] = 0
    same_practice: bool = False
    reuse_controls: bool = False
    seed: Annotated[int, Field(ge=0, le=2**31 - 1)]
    contact_within_days: Annotated[int, Field(ge=0, le=3650)] = 365

    @property
    def pool(self) -> str:
        """The pool in effect: ``controls_from``, else the cohort for cases, else the source."""
        if self.controls_from is not None:
            return self.controls_from
        return "cohort" if self.exposed_in is None else "source_population"

    @property
    def opener(self) -> str:
        """The outcome or exposure group whose patients open sets (its name)."""
        name = self.cases_of if self.cases_of is not None else self.exposed_in
        assert name is not None  # exactly one of the two, checked at load (matching_problems)
        return name

    @property
    def opener_role(self) -> str:
        """The ``role`` of the patient who opens a set in ``matched.parquet``."""
        return "case" if self.exposed_in is None else "exposed"


def matching_problems(
    doc: LocatedDocument,
    matching: Matching | None,
    outcomes: tuple[str, ...],
    groups: tuple[str, ...] | None,
) -> list[Problem]:
    """Refuse sets opened by something the study does not have, or controls from no pool.

    Args:
        doc: The study file, to locate the problem.
        matching: The study's option (None: nothing to check).
        outcomes: The study's outcome names.
        groups: The study's exposure groups (None: the study has no ``exposure:`` section).
    """
    if matching is None:
        return []
    if (matching.cases_of is None) == (matching.exposed_in is None):
        return [
            doc.problem(
                ("matching",),
                "matching-opener",
                "matching needs exactly one of cases_of (an outcome whose incident cases open "
                "sets) and exposed_in (an exposure group whose new users open sets)",
            )
        ]
    if matching.exposed_in is not None:
        return _exposed_problems(doc, matching, matching.exposed_in, groups)
    if matching.cases_of in outcomes:
        return []
    return [
        doc.problem(
            ("matching", "cases_of"),
            "unknown-outcome",
            f"cases_of '{matching.cases_of}' is not an outcome of the study "
            f"(outcomes: {', '.join(outcomes)}); matched sets are opened by an outcome's "
            "incident cases",
            at_value=True,
        )
    ]


def _exposed_problems(
    doc: LocatedDocument, matching: Matching, group: str, groups: tuple[str, ...] | None
) -> list[Problem]:
    """An ``exposed_in`` needs a new-user study with that group, and controls from outside it."""
    if groups is None:
        return [
            doc.problem(
                ("matching", "exposed_in"),
                "exposed-without-exposure",
                f"exposed_in '{group}' names an exposure group, but the study has no exposure: "
                "section; sets opened by new users need a new-user study",
                at_value=True,
            )
        ]
    if group not in groups:
        return [
            doc.problem(
                ("matching", "exposed_in"),
                "unknown-exposure-group",
                f"exposed_in '{group}' is not an exposure group of the study "
                f"(groups: {', '.join(groups)})",
                at_value=True,
            )
        ]
    if matching.controls_from == "cohort":
        return [
            doc.problem(
                ("matching", "controls_from"),
                "exposed-controls-pool",
                "controls_from: cohort cannot give controls to exposed patients: every patient "
                "of a new-user cohort is exposed; use source_population (the default with "
                "exposed_in)",
                at_value=True,
            )
        ]
    return []


def matching_text(option: Matching) -> str:
    """One sentence on what the option draws, for ``check --explain``."""
    if option.exposed_in is not None:
        return _exposed_text(option)
    if option.pool == "source_population":
        return _case_source_text(option)
    practice = ", at the same practice" if option.same_practice else ""
    reuse = "with" if option.reuse_controls else "without"
    return (
        f" Matched controls: up to {option.controls_per_case} per incident {option.cases_of} "
        f"case, of the same sex, born within {option.birth_year_within} years{practice}, in "
        f"contact within {option.contact_within_days} days and free of {option.cases_of} on the "
        f"case's onset date, drawn {reuse} replacement with seed {option.seed} (matched.parquet)."
    )


def _like(option: Matching) -> str:
    practice = ", at the same practice" if option.same_practice else ""
    return f"of the same sex, born within {option.birth_year_within} years{practice}"


def _drawn(option: Matching) -> str:
    reuse = "with" if option.reuse_controls else "without"
    return f"drawn {reuse} replacement with seed {option.seed} (matched.parquet)."


def _exposed_text(option: Matching) -> str:
    return (
        f" Matched controls: up to {option.controls_per_case} per new user of "
        f"{option.exposed_in} in the cohort, from the source population (the extract's "
        f"patients), {_like(option)}, registered, alive, in contact within "
        f"{option.contact_within_days} days and with no record of any exposure group on or "
        "before the new user's index date, and free of the study's outcomes on it, "
        f"{_drawn(option)}"
    )


def _case_source_text(option: Matching) -> str:
    return (
        f" Matched controls: up to {option.controls_per_case} per incident {option.cases_of} "
        f"case, from the source population (the extract's patients), {_like(option)}, "
        f"registered, alive, in contact within {option.contact_within_days} days and free of "
        f"{option.cases_of} on the case's onset date, {_drawn(option)}"
    )
