"""Pydantic models of condition files (case definitions).

The vocabulary is ours (README.md shows it). Every model forbids unknown keys, so a typo is an error
with a suggestion instead of a silently ignored setting.
"""

from __future__ import annotations

import datetime as dt
from typing import Annotated, Literal, Self

from pydantic import Field, PrivateAttr, ValidationInfo, field_validator, model_validator

from pipeline.config._base import (
    ONE_OR_MORE,
    ATCCode,
    ICD9Code,
    ICD10Code,
    Model,
    Name,
    NonNegativeInt,
    PositiveInt,
    Quantity,
)
from pipeline.config._measure import measures_in
from pipeline.measures import Comparison, Threshold

# A code list file (its CSV), relative to the file that names it.
ListFile = Annotated[str, Field(pattern=r"\.csv$")]


class DiagnosisCodes(Model):
    """Code prefixes (or ranges such as ``I10-I15``) per system, as written in a definition.

    ``lists`` names code list files (``../codelists/heart_failure_icd10.csv``), relative to
    the definition file; their codes count as if written here, matched as each list declares.
    """

    ICD9: Annotated[tuple[ICD9Code, ...], ONE_OR_MORE] = ()
    ICD10: Annotated[tuple[ICD10Code, ...], ONE_OR_MORE] = ()
    lists: Annotated[tuple[ListFile, ...], ONE_OR_MORE] = ()


class DiagnosisEvidence(DiagnosisCodes):
    """Diagnosis rows whose code matches, optionally from some sources only."""

    exclude: DiagnosisCodes | None = None
    source: Annotated[tuple[Literal["billing", "problem_list", "visit"], ...], ONE_OR_MORE] = ()

    @model_validator(mode="after")
    def _needs_codes(self) -> Self:
        if not (self.ICD9 or self.ICD10 or self.lists):
            raise ValueError("a diagnosis needs at least one ICD9 or ICD10 code or a code list")
        return self


class PrescriptionEvidence(Model):
    """Prescriptions whose WHO ATC code starts with a prefix, optionally lasting long enough.

    ``min_days`` counts the days from start to stop, both included; a prescription without a
    stop date does not meet a minimum duration. ``lists`` names ATC code list files (their
    ``excluded`` rows are exclusions), relative to the definition file.
    """

    atc: Annotated[tuple[ATCCode, ...], ONE_OR_MORE] = ()
    lists: Annotated[tuple[ListFile, ...], ONE_OR_MORE] = ()
    exclude: Annotated[tuple[ATCCode, ...], ONE_OR_MORE] = ()
    min_days: PositiveInt | None = None

    @model_validator(mode="after")
    def _needs_codes(self) -> Self:
        if not (self.atc or self.lists):
            raise ValueError("a prescription needs at least one atc code or a code list")
        return self


class MeasurementEvidence(Model):
    """Measurements of one measure compared with thresholds written with their units.

    A coded measure (smoking status) takes ``category`` instead of thresholds.
    """

    measure: str
    at_least: Quantity | None = None
    above: Quantity | None = None
    below: Quantity | None = None
    at_most: Quantity | None = None
    between: tuple[Quantity, Quantity] | None = None
    category: Annotated[tuple[str, ...], ONE_OR_MORE] = ()

    _thresholds: tuple[Threshold, ...] = PrivateAttr(default=())

    @field_validator("measure")
    @classmethod
    def _known_measure(cls, value: str, info: ValidationInfo) -> str:
        measures_in(info).known(value)  # raises naming the known measures
        return value

    @field_validator("at_least", "above", "below", "at_most", "between")
    @classmethod
    def _convertible(
        cls, value: Quantity | tuple[Quantity, Quantity] | None, info: ValidationInfo
    ) -> Quantity | tuple[Quantity, Quantity] | None:
        measure = measures_in(info).get(info.data.get("measure", ""))
        if value is None or measure is None or measure.is_coded:
            return value
        for text in value if isinstance(value, tuple) else (value,):
            measure.threshold("at_least", text)  # raises with the reason
        return value

    def thresholds(self) -> tuple[Threshold, ...]:
        """Return the thresholds in canonical units, converted when the file was loaded.

        Converted by the measures the definition was loaded with (the study's own measure
        files included), so later stages need not know where the measure came from.
        """
        return self._thresholds

    @model_validator(mode="after")
    def _valid_comparison(self, info: ValidationInfo) -> Self:
        measure = measures_in(info).known(self.measure)
        written: list[tuple[Comparison, Quantity]] = [
            (comparison, text)
            for comparison, text in (
                ("at_least", self.at_least),
                ("above", self.above),
                ("below", self.below),
                ("at_most", self.at_most),
            )
            if text is not None
        ]
        if self.between is not None:
            written += [("at_least", self.between[0]), ("at_most", self.between[1])]
        if measure.is_coded:
            unknown = sorted(set(self.category) - set(measure.categories))
            if not self.category or unknown or written:
                raise ValueError(
                    f"{self.measure} is a coded measure: give category with some of "
                    f"{', '.join(measure.categories)}"
                    + (f" (unknown: {', '.join(unknown)})" if unknown else "")
                )
            return self
        if self.category:
            raise ValueError(f"{self.measure} is numeric: use thresholds, not category")
        thresholds = tuple(measure.threshold(comparison, text) for comparison, text in written)
        if not thresholds:
            raise ValueError(
                "a measurement needs at least one of at_least, above, below, at_most, between"
            )
        low = max((t.canonical_value for t in thresholds if t.comparison in _LOWER), default=None)
        high = min((t.canonical_value for t in thresholds if t.comparison in _UPPER), default=None)
        if low is not None and high is not None and low > high:
            raise ValueError("the thresholds leave no value that could qualify")
        self._thresholds = thresholds
        return self


_LOWER = ("at_least", "above")
_UPPER = ("below", "at_most")


class EncounterEvidence(Model):
    """Encounters of some types (compared lower-cased); no types means any encounter."""

    type: Annotated[tuple[str, ...], ONE_OR_MORE] = ()


class Evidence(Model):
    """One named piece of evidence: exactly one kind of extract row, or another condition.

    ``condition: other`` is one event per patient on the other condition's onset date.
    """

    diagnosis: DiagnosisEvidence | None = None
    prescription: PrescriptionEvidence | None = None
    measurement: MeasurementEvidence | None = None
    encounter: EncounterEvidence | None = None
    condition: Name | None = None

    @model_validator(mode="after")
    def _exactly_one_kind(self) -> Self:
        kinds = [k for k in EVIDENCE_KINDS if getattr(self, k) is not None]
        if len(kinds) != 1:
            raise ValueError(
                f"evidence needs exactly one of {', '.join(EVIDENCE_KINDS)}"
                + (f" (got {', '.join(kinds)})" if kinds else "")
            )
        return self

    @property
    def kind(self) -> str:
        """Which kind of evidence this is."""
        return next(k for k in EVIDENCE_KINDS if getattr(self, k) is not None)


EVIDENCE_KINDS = ("diagnosis", "prescription", "measurement", "encounter", "condition")


AbsentWindow = tuple[int | None, int | None]


class Rule(Model):
    """A way the evidence makes a case: counts of evidence met inside a window.

    ``absent`` lists evidence that must not occur for the rule to count, e.g. no non-insulin
    glucose-lowering drug. Without ``absent_window`` it must never occur (up to the end of
    data), so a record made years later can undo a case retroactively. ``absent_window:
    [start, end]`` bounds that: the rule is met on the earliest date ``t`` on which its need is
    met and no absent evidence is dated in ``[t + start, t + end]`` (days, both ends included;
    ``null`` start is all history before, ``null`` end all of the record after).
    """

    name: str
    need: dict[str, PositiveInt] = Field(min_length=1)
    distinct_days: bool = False
    within_days: NonNegativeInt | None = None
    apart_at_least_days: NonNegativeInt | None = None
    absent: Annotated[tuple[str, ...], ONE_OR_MORE] = ()
    absent_window: AbsentWindow | None = None

    @model_validator(mode="after")
    def _window_is_consistent(self) -> Self:
        total = sum(self.need.values())
        if total > 1 and self.within_days is None and self.apart_at_least_days is None:
            raise ValueError("a rule needing more than one event needs within_days")
        if self.apart_at_least_days is not None and total != 2:
            raise ValueError("apart_at_least_days applies to rules that need exactly two events")
        if (
            self.apart_at_least_days is not None
            and self.within_days is not None
            and self.apart_at_least_days > self.within_days
        ):
            raise ValueError("apart_at_least_days is larger than within_days: no pair can qualify")
        both = sorted(set(self.absent) & set(self.need))
        if both:
            raise ValueError(f"evidence both needed and absent: {', '.join(both)}")
        if self.absent_window is not None:
            start, end = self.absent_window
            if not self.absent:
                raise ValueError("absent_window is given but the rule lists no absent evidence")
            if start is not None and end is not None and start > end:
                raise ValueError(f"absent_window starts ({start}) after it ends ({end})")
        return self


class Provenance(Model):
    """Where a definition comes from, so a reader can judge it and cite the right version.

    Attributes:
        adapts: The published algorithm the definition adapts, as "Author et al., year", or
            "our own, in the style of ..." when it adapts no single publication.
        icd_edition: Which ICD editions its codes are written in, e.g. "ICD-10 (WHO) and
            ICD-9-CM"; prefix matching means the same list can mean different codes in another
            edition.
        version: The definition's own version, dotted numbers ("1.1"); raise it on any change
            that can change who is a case.
        date: The date of that version.
    """

    adapts: Annotated[str, Field(min_length=1)]
    icd_edition: Annotated[str, Field(min_length=1)]
    version: Annotated[str, Field(pattern=r"^[0-9]+(\.[0-9]+)*$")]
    date: dt.date


class Condition(Model):
    """A case definition: named evidence and the rules that turn it into a case.

    ``onset: rule_met`` (the default) dates the case on the first day a rule is met;
    ``first_evidence`` on the earliest evidence of the sets of events that met a rule that day
    (of every such set, when several meet one), so evidence outside those sets (an inhaler
    years before the codes) never dates the case.

    ``title`` is also the condition's label wherever a table names it for readers: the data
    dictionary's meanings ("Heart failure on or before the index date"), and from them Table 1
    and the report's headings, curves and incidence table. A condition has no second name.
    """

    condition: Name
    title: str
    about: str
    provenance: Provenance | None = None
    evidence: dict[Name, Evidence] = Field(min_length=1)
    rules: tuple[Rule, ...] = Field(min_length=1)
    onset: Literal["rule_met", "first_evidence"] = "rule_met"

    @property
    def references(self) -> tuple[str, ...]:
        """Other conditions this one uses as evidence, sorted."""
        return tuple(sorted({e.condition for e in self.evidence.values() if e.condition}))


def find_cycle(start: str, catalog: dict[str, Condition]) -> list[str] | None:
    """The chain from ``start`` back to itself through condition references, if any."""
    stack: list[tuple[str, list[str]]] = [(start, [start])]
    seen: set[str] = set()
    while stack:
        name, chain = stack.pop()
        for ref in catalog[name].references:
            if ref == start:
                return [*chain, start]
            if ref not in seen:
                seen.add(ref)
                stack.append((ref, [*chain, ref]))
    return None
