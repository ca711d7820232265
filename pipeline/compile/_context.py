"""What every compile pass needs to know about the study, worked out once."""

from __future__ import annotations

import datetime as dt
import zlib
from dataclasses import dataclass, field
from functools import cached_property

from sqlglot import exp

from pipeline.codes import CHARLSON_CATEGORIES
from pipeline.compile._contact import eligibility_with_default
from pipeline.config import (
    Catalog,
    Condition,
    Criterion,
    DiagnosisCodes,
    DiagnosisEvidence,
    Evidence,
    ListUse,
    Study,
)
from pipeline.config._localcodes import LocalCodes
from pipeline.config._measure import shipped_measures
from pipeline.measures import DERIVED_FROM, MeasureRegistry

# Evidence the study itself defines (not a condition) gets keys starting with "@", which no
# condition name can, so the two never collide.
INDEX_EVENT = "@index.first_event"


def evidence_key(condition: str, evidence: str) -> str:
    """The value that names one piece of evidence in the plan's tables.

    >>> evidence_key("ckd", "egfr_low")
    'ckd.egfr_low'
    """
    return f"{condition}.{evidence}"


def evidence_number(key: str) -> int:
    """The number that stands for an evidence key in the plan's tables (a CRC-32 of the key).

    Evidence is grouped and joined by the tens of millions of rows; a small integer does that
    several times faster than a text key. The number depends on the key alone, so every stage
    and every engine agrees on it; the compiler checks that a study's keys never share one.
    """
    return zlib.crc32(key.encode("utf-8")) & 0x7FFFFFFF


def evidence_id(key: str) -> exp.Expression:
    """The SQL literal of an evidence key's number, with the key beside it as a comment."""
    literal = exp.Literal.number(evidence_number(key))
    literal.add_comments([key.replace("*/", "* /")])
    return literal


def step_key(number: int) -> str:
    """The evidence key of an eligibility step's own evidence."""
    return f"@eligibility.{number}"


def covariate_key(name: str) -> str:
    """The evidence key of a covariate's own evidence."""
    return f"@covariate.{name}"


def exposure_key(group: str) -> str:
    """The evidence key of one exposure group (``exposure:`` section)."""
    return f"@exposure.{group}"


def charlson_key(category: str) -> str:
    """The evidence key of one Charlson category."""
    return f"@charlson.{category}"


@dataclass(frozen=True)
class CompileContext:
    """A study and its definitions, with the facts the passes share.

    ``registry`` holds the measures the study may read (shipped, and its own files);
    ``local_codes`` the extract's own product and lab test codes the study maps.
    """

    study: Study
    catalog: Catalog
    registry: MeasureRegistry = field(default_factory=shipped_measures)
    local_codes: LocalCodes = field(default_factory=LocalCodes)

    @cached_property
    def outcomes(self) -> tuple[Condition, ...]:
        """Outcome conditions, in the order the study names them."""
        return tuple(self.catalog.get(name) for name in self.study.outcomes.conditions)

    @cached_property
    def eligibility(self) -> tuple[Criterion, ...]:
        """The eligibility steps in force.

        The study's, with a default in-contact step first for fixed-date studies that end
        follow-up at loss of contact (see ``_contact``).
        """
        return eligibility_with_default(self.study)[0]

    @cached_property
    def flagged(self) -> tuple[str, ...]:
        """Conditions whose onset the study reads: outcomes, covariates, steps, the index."""
        names = list(self.study.outcomes.conditions)
        names += [c.condition for c in self.study.covariates.values() if c.condition]
        names += [c.not_prevalent for c in self.eligibility if c.not_prevalent]
        event = self.study.index.first_event
        if event is not None and event.condition is not None:
            names.append(event.condition)
        return tuple(dict.fromkeys(names))

    @cached_property
    def first_evidence_of(self) -> tuple[str, ...]:
        """Conditions whose first evidence a covariate dates from."""
        names = [c.days_since_first_evidence for c in self.study.covariates.values()]
        return tuple(dict.fromkeys(n for n in names if n))

    @cached_property
    def study_evidence(self) -> tuple[tuple[str, Evidence], ...]:
        """Evidence the study defines itself: the index event, steps, covariate counts, scores."""
        found: list[tuple[str, Evidence]] = []
        event = self.study.index.first_event
        if event is not None and event.evidence is not None:
            found.append((INDEX_EVENT, event.evidence))
        if self.study.exposure is not None:
            found += [(exposure_key(g), ev) for g, ev in self.study.exposure.groups.items()]
        for i, criterion in enumerate(self.eligibility, start=1):
            # encounter-kind evidence of the study is counted from encounters directly
            no_evidence = criterion.no_evidence
            if no_evidence is not None and no_evidence.evidence.encounter is None:
                found.append((step_key(i), no_evidence.evidence))
        for name, covariate in self.study.covariates.items():
            if covariate.count is not None and covariate.count.encounter is None:
                found.append((covariate_key(name), covariate.count))
        charlson = [c.charlson for c in self.study.covariates.values() if c.charlson]
        if charlson:
            systems = set(charlson[0].codes)  # one code basis per study (checked at load)
            for category in CHARLSON_CATEGORIES:
                icd10, icd10_except = category.codes("ICD10") if "ICD10" in systems else ((), ())
                icd9, icd9_except = category.codes("ICD9") if "ICD9" in systems else ((), ())
                exclude = (
                    DiagnosisCodes(ICD10=icd10_except, ICD9=icd9_except)
                    if icd10_except or icd9_except
                    else None
                )
                evidence = Evidence(
                    diagnosis=DiagnosisEvidence(ICD10=icd10, ICD9=icd9, exclude=exclude)
                )
                found.append((charlson_key(category.name), evidence))
        return tuple(found)

    @cached_property
    def conditions(self) -> tuple[Condition, ...]:
        """Every condition to evaluate, each after the conditions it refers to."""
        names = self.catalog.with_references(self.flagged + self.first_evidence_of)
        return tuple(self.catalog.get(n) for n in names)

    @cached_property
    def evidence(self) -> tuple[tuple[str, Evidence], ...]:
        """Every piece of evidence read from the extract, by key, in a fixed order."""
        conditions = tuple(
            (evidence_key(c.condition, name), ev)
            for c in self.conditions
            for name, ev in sorted(c.evidence.items())
            if ev.condition is None
        )
        return conditions + self.study_evidence

    @cached_property
    def evidence_lists(self) -> dict[str, tuple[ListUse, ...]]:
        """The code lists each piece of evidence names, by evidence key (none: absent)."""
        return {
            evidence_key(c.condition, name): uses
            for c in self.conditions
            for name, uses in self.catalog.code_lists.get(c.condition, {}).items()
        }

    @cached_property
    def list_systems(self) -> tuple[str, ...]:
        """The diagnosis systems the study's code lists read beyond ICD-9 and ICD-10, sorted."""
        systems = {use.code_list.system for uses in self.evidence_lists.values() for use in uses}
        return tuple(sorted(systems - {"ICD9", "ICD10", "ATC"}))

    @property
    def index_range(self) -> tuple[dt.date, dt.date]:
        """The first and last dates any index date can fall on."""
        return self.study.index.possible

    @cached_property
    def measures(self) -> tuple[str, ...]:
        """Measures the evidence reads, with those needed to derive them."""
        wanted = {ev.measurement.measure for _, ev in self.evidence if ev.measurement}
        for covariate in self.study.covariates.values():
            measure = covariate.latest or covariate.mean or covariate.minimum or covariate.maximum
            if measure:
                wanted.add(measure)
        for derived, sources in DERIVED_FROM.items():
            if derived in wanted:
                wanted.update(sources)
        return tuple(sorted(wanted))

    @property
    def numeric_measures(self) -> tuple[str, ...]:
        """The measures read as numbers (not coded)."""
        return tuple(m for m in self.measures if not self.registry[m].is_coded)

    def uses(self, kind: str) -> bool:
        """Whether any evidence is of this kind (diagnosis, prescription, encounter ...)."""
        return any(getattr(ev, kind) is not None for _, ev in self.evidence)

    @property
    def uses_coded_events(self) -> bool:
        """Whether any evidence is matched by code (diagnoses or prescriptions)."""
        return self.uses("diagnosis") or self.uses("prescription")
