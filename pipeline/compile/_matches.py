"""Which definitions the study uses match no row of the extract.

A definition whose codes or thresholds match nothing (a code list for another ICD edition, a
threshold in the wrong unit) does not fail: it silently makes every patient a non-case, or a
covariate all zero. ``evidence_counts`` counts the rows of ``evidence_events`` per piece of
evidence, a small grouping of a table the plan holds anyway, never another scan of the
extract; :func:`unmatched_uses` turns those counts into one warning per use that matched
nothing.
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._context import (
    INDEX_EVENT,
    CompileContext,
    covariate_key,
    evidence_key,
    evidence_number,
    exposure_key,
    step_key,
)
from pipeline.compile._plan import Stage
from pipeline.compile._sql import query

EVIDENCE_COUNTS = names.EVIDENCE_COUNTS

_EVIDENCE_COUNTS = """
SELECT evidence, COUNT(*) AS n_events
FROM :events
GROUP BY evidence
"""


def match_count_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """``evidence_counts``: patient-days of evidence per piece of evidence that has any."""
    del ctx  # the same stage for every study
    return (
        Stage(
            EVIDENCE_COUNTS,
            query(_EVIDENCE_COUNTS, events=exp.to_table(names.EVIDENCE_EVENTS)),
            "patient-days per piece of evidence, so a definition matching no row is reported",
        ),
    )


@dataclass(frozen=True)
class Use:
    """One place the study reads a definition or evidence of its own.

    Attributes:
        what: How the study uses it, e.g. ``outcome 'gout'``.
        definition: The condition it reads, or "" for evidence the study defines itself.
        keys: The evidence keys read from the extract (a condition's, with those of the
            conditions it refers to).
    """

    what: str
    definition: str
    keys: tuple[str, ...]

    def message(self) -> str:
        """The warning shown when none of its evidence matched a row."""
        if self.definition:
            return (
                f"{self.what}: the definition '{self.definition}' matches no row of the extract "
                f"(evidence {', '.join(self.keys)}); every patient comes out without it"
            )
        return (
            f"{self.what}: its evidence matches no row of the extract; every patient comes out "
            "without it"
        )


def _condition_keys(ctx: CompileContext, name: str) -> tuple[str, ...]:
    return tuple(
        evidence_key(condition.condition, evidence)
        for condition in (ctx.catalog.get(n) for n in ctx.catalog.with_references((name,)))
        for evidence, ev in sorted(condition.evidence.items())
        if ev.condition is None
    )


def study_uses(ctx: CompileContext) -> tuple[Use, ...]:
    """Every outcome, covariate, eligibility step and index event that reads the extract."""
    study = ctx.study
    uses = [Use(f"outcome '{n}'", n, ()) for n in study.outcomes.conditions]
    for name, cov in study.covariates.items():
        condition = cov.condition or cov.days_since_first_evidence
        if condition:
            uses.append(Use(f"covariate '{name}'", condition, ()))
        elif cov.count is not None and cov.count.encounter is None:
            uses.append(Use(f"covariate '{name}'", "", (covariate_key(name),)))
    for i, step in enumerate(ctx.eligibility, start=1):
        if step.not_prevalent:
            uses.append(Use(f"eligibility step {i}", step.not_prevalent, ()))
        elif step.no_evidence is not None and step.no_evidence.evidence.encounter is None:
            uses.append(Use(f"eligibility step {i}", "", (step_key(i),)))
    event = study.index.first_event
    if event is not None and event.condition:
        uses.append(Use("the index event", event.condition, ()))
    elif event is not None and event.evidence is not None:
        uses.append(Use("the index event", "", (INDEX_EVENT,)))
    groups = study.exposure.groups if study.exposure is not None else {}
    uses += [Use(f"exposure group '{g}'", "", (exposure_key(g),)) for g in groups]
    return tuple(
        Use(u.what, u.definition, _condition_keys(ctx, u.definition)) if u.definition else u
        for u in uses
    )


def unmatched_uses(ctx: CompileContext, counts: dict[int, int]) -> list[Use]:
    """The uses none of whose evidence has a row in ``evidence_counts`` (number -> count)."""
    return [
        use
        for use in study_uses(ctx)
        if not any(counts.get(evidence_number(key), 0) for key in use.keys)
    ]
