"""The study's ``matching:`` option: controls drawn for the cases of one outcome.

Each incident case of the named outcome in the cohort opens a matched set dated on its onset
(the set's date). Up to ``controls_per_case`` controls are drawn for it by incidence-density
sampling from the cohort: patients of the same sex, born within ``birth_year_within`` years of
the case (and, with ``same_practice``, registered at the same practice) who on the set's date
are under follow-up, in contact and free of the outcome. A control may become a case later.
The draw is by a hash of (``seed``, case, candidate), so the same study and extract always give
the same sets, on every engine. The compiler's side is ``pipeline/compile/_matching.py``.
"""

from __future__ import annotations

from typing import Annotated

from pydantic import Field

from pipeline.config._base import Model, Name
from pipeline.config._yaml import LocatedDocument
from pipeline.errors import Problem


class Matching(Model):
    """How controls are drawn for the cases of one outcome (``matched.parquet``).

    Attributes:
        cases_of: The outcome (one of ``outcomes.conditions``) whose incident cases open sets.
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

    cases_of: Name
    controls_per_case: Annotated[int, Field(ge=1, le=50)]
    birth_year_within: Annotated[int, Field(ge=0, le=10)] = 0
    same_practice: bool = False
    reuse_controls: bool = False
    seed: Annotated[int, Field(ge=0, le=2**31 - 1)]
    contact_within_days: Annotated[int, Field(ge=0, le=3650)] = 365


def matching_problems(
    doc: LocatedDocument, matching: Matching | None, outcomes: tuple[str, ...]
) -> list[Problem]:
    """Refuse a ``cases_of`` that is not one of the study's outcomes.

    Args:
        doc: The study file, to locate the problem.
        matching: The study's option (None: nothing to check).
        outcomes: The study's outcome names.
    """
    if matching is None or matching.cases_of in outcomes:
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


def matching_text(option: Matching) -> str:
    """One sentence on what the option draws, for ``check --explain``."""
    practice = ", at the same practice" if option.same_practice else ""
    reuse = "with" if option.reuse_controls else "without"
    return (
        f" Matched controls: up to {option.controls_per_case} per incident {option.cases_of} "
        f"case, of the same sex, born within {option.birth_year_within} years{practice}, in "
        f"contact within {option.contact_within_days} days and free of {option.cases_of} on the "
        f"case's onset date, drawn {reuse} replacement with seed {option.seed} (matched.parquet)."
    )
