"""What every compile pass needs to know about the study, worked out once."""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

from pipeline.config import Catalog, Condition, Evidence, Study


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
    def conditions(self) -> tuple[Condition, ...]:
        """Conditions the study uses, in the order the study names them."""
        return tuple(self.catalog.get(name) for name in self.study.outcomes.conditions)

    @cached_property
    def evidence(self) -> tuple[tuple[str, Evidence], ...]:
        """Every piece of evidence the study's conditions use, by key, in a fixed order."""
        return tuple(
            (evidence_key(c.condition, name), ev)
            for c in self.conditions
            for name, ev in sorted(c.evidence.items())
        )

    @cached_property
    def measures(self) -> tuple[str, ...]:
        """Measures the evidence compares, plus creatinine when eGFR may be derived from it."""
        wanted = {ev.measurement.measure for _, ev in self.evidence if ev.measurement}
        if "egfr" in wanted:
            wanted.add("creatinine")
        return tuple(sorted(wanted))

    @property
    def uses_diagnoses(self) -> bool:
        """Whether any evidence reads the diagnoses table."""
        return any(ev.diagnosis for _, ev in self.evidence)

    @property
    def uses_prescriptions(self) -> bool:
        """Whether any evidence reads the prescriptions table."""
        return any(ev.prescription for _, ev in self.evidence)

    @property
    def uses_coded_events(self) -> bool:
        """Whether any evidence is matched by code (diagnoses or prescriptions)."""
        return self.uses_diagnoses or self.uses_prescriptions
