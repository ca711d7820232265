"""What every compile pass needs to know about the study, worked out once."""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

from pipeline.config import Catalog, Condition, Evidence, Study
from pipeline.measures import DERIVED_FROM, MEASURES


def evidence_key(condition: str, evidence: str) -> str:
    """The value that names one piece of evidence in the plan's tables.

    >>> evidence_key("ckd", "egfr_low")
    'ckd.egfr_low'
    """
    return f"{condition}.{evidence}"


@dataclass(frozen=True)
class CompileContext:
    """A study and its definitions, with the facts the passes share."""

    study: Study
    catalog: Catalog

    @cached_property
    def outcomes(self) -> tuple[Condition, ...]:
        """Outcome conditions, in the order the study names them."""
        return tuple(self.catalog.get(name) for name in self.study.outcomes.conditions)

    @cached_property
    def flagged(self) -> tuple[str, ...]:
        """Conditions whose onset the analysis table needs: outcomes, then covariate flags."""
        names = list(self.study.outcomes.conditions)
        names += [c.condition for c in self.study.covariates.values() if c.condition]
        return tuple(dict.fromkeys(names))

    @cached_property
    def conditions(self) -> tuple[Condition, ...]:
        """Every condition to evaluate, each after the conditions it refers to."""
        return tuple(self.catalog.get(n) for n in self.catalog.with_references(self.flagged))

    @cached_property
    def evidence(self) -> tuple[tuple[str, Evidence], ...]:
        """Every piece of evidence read from the extract, by key, in a fixed order."""
        return tuple(
            (evidence_key(c.condition, name), ev)
            for c in self.conditions
            for name, ev in sorted(c.evidence.items())
            if ev.condition is None
        )

    @cached_property
    def measures(self) -> tuple[str, ...]:
        """Measures the evidence reads, with those needed to derive them."""
        wanted = {ev.measurement.measure for _, ev in self.evidence if ev.measurement}
        for derived, sources in DERIVED_FROM.items():
            if derived in wanted:
                wanted.update(sources)
        return tuple(sorted(wanted))

    @property
    def numeric_measures(self) -> tuple[str, ...]:
        """The measures read as numbers (not coded)."""
        return tuple(m for m in self.measures if not MEASURES[m].is_coded)

    def uses(self, kind: str) -> bool:
        """Whether any evidence is of this kind (diagnosis, prescription, encounter ...)."""
        return any(getattr(ev, kind) is not None for _, ev in self.evidence)

    @property
    def uses_coded_events(self) -> bool:
        """Whether any evidence is matched by code (diagnoses or prescriptions)."""
        return self.uses("diagnosis") or self.uses("prescription")
