"""Pydantic models of condition files and study files.

The vocabulary is ours (see DESIGN.md). Every model forbids unknown keys, so a typo is an error
with a suggestion instead of a silently ignored setting.
"""

from __future__ import annotations

import datetime as dt
from functools import partial
from pathlib import Path
from typing import Annotated, Literal, Self

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    ValidationInfo,
    field_validator,
    model_validator,
)

from pipeline.codes import check_code
from pipeline.measures import MEASURES, Threshold
from pipeline.measures._threshold import Comparison

NonNegativeInt = Annotated[int, Field(ge=0)]
PositiveInt = Annotated[int, Field(ge=1)]
Name = Annotated[str, Field(pattern=r"^[a-z][a-z0-9_]*$", max_length=48)]
ICD9Code = Annotated[str, AfterValidator(partial(check_code, "ICD9"))]
ICD10Code = Annotated[str, AfterValidator(partial(check_code, "ICD10"))]
ATCCode = Annotated[str, AfterValidator(partial(check_code, "ATC"))]
Quantity = str | float


class Model(BaseModel):
    """Base of every config model: unknown keys are errors, values are immutable."""

    model_config = ConfigDict(extra="forbid", frozen=True)


class DiagnosisCodes(Model):
    """Code prefixes (or ranges such as ``I10-I15``) per system, as written in a definition."""

    ICD9: tuple[ICD9Code, ...] = ()
    ICD10: tuple[ICD10Code, ...] = ()


class DiagnosisEvidence(DiagnosisCodes):
    """Diagnosis rows whose code matches, optionally from some sources only."""

    exclude: DiagnosisCodes | None = None
    source: tuple[Literal["billing", "problem_list", "visit"], ...] = ()

    @model_validator(mode="after")
    def _needs_codes(self) -> Self:
        if not (self.ICD9 or self.ICD10):
            raise ValueError("a diagnosis needs at least one ICD9 or ICD10 code")
        return self


class PrescriptionEvidence(Model):
    """Prescriptions whose WHO ATC code starts with a prefix, optionally lasting long enough.

    ``min_days`` counts the days from start to stop, both included; a prescription without a
    stop date does not meet a minimum duration.
    """

    atc: tuple[ATCCode, ...] = Field(min_length=1)
    exclude: tuple[ATCCode, ...] = ()
    min_days: PositiveInt | None = None


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
    category: tuple[str, ...] = ()

    @field_validator("measure")
    @classmethod
    def _known_measure(cls, value: str) -> str:
        if value not in MEASURES:
            raise ValueError(f"unknown measure '{value}'; known: {', '.join(sorted(MEASURES))}")
        return value

    @field_validator("at_least", "above", "below", "at_most", "between")
    @classmethod
    def _convertible(
        cls, value: Quantity | tuple[Quantity, Quantity] | None, info: ValidationInfo
    ) -> Quantity | tuple[Quantity, Quantity] | None:
        measure = info.data.get("measure")
        if value is None or measure is None or MEASURES[measure].is_coded:
            return value
        for text in value if isinstance(value, tuple) else (value,):
            Threshold.parse(measure, "at_least", text)  # raises with the reason
        return value

    def thresholds(self) -> tuple[Threshold, ...]:
        """Return the thresholds in canonical units (they were checked at load time)."""
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
        return tuple(
            Threshold.parse(self.measure, comparison, text) for comparison, text in written
        )

    @model_validator(mode="after")
    def _valid_comparison(self) -> Self:
        measure = MEASURES[self.measure]
        if measure.is_coded:
            unknown = sorted(set(self.category) - set(measure.categories))
            if not self.category or unknown or self.thresholds():
                raise ValueError(
                    f"{self.measure} is a coded measure: give category with some of "
                    f"{', '.join(measure.categories)}"
                    + (f" (unknown: {', '.join(unknown)})" if unknown else "")
                )
            return self
        if self.category:
            raise ValueError(f"{self.measure} is numeric: use thresholds, not category")
        thresholds = self.thresholds()
        if not thresholds:
            raise ValueError(
                "a measurement needs at least one of at_least, above, below, at_most, between"
            )
        low = max((t.canonical_value for t in thresholds if t.comparison in _LOWER), default=None)
        high = min((t.canonical_value for t in thresholds if t.comparison in _UPPER), default=None)
        if low is not None and high is not None and low > high:
            raise ValueError("the thresholds leave no value that could qualify")
        return self


_LOWER = ("at_least", "above")
_UPPER = ("below", "at_most")


class EncounterEvidence(Model):
    """Encounters of some types (compared lower-cased)."""

    type: tuple[str, ...] = Field(min_length=1)


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


class Rule(Model):
    """A way the evidence makes a case: counts of evidence met inside a window.

    ``absent`` lists evidence that must never occur (up to the end of data) for the rule to
    count, e.g. no type 1 diabetes code ever.
    """

    name: str
    need: dict[str, PositiveInt] = Field(min_length=1)
    distinct_days: bool = False
    within_days: NonNegativeInt | None = None
    apart_at_least_days: NonNegativeInt | None = None
    absent: tuple[str, ...] = ()

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
        return self


class Condition(Model):
    """A case definition: named evidence and the rules that turn it into a case."""

    condition: Name
    title: str
    about: str
    evidence: dict[Name, Evidence] = Field(min_length=1)
    rules: tuple[Rule, ...] = Field(min_length=1)
    onset: Literal["rule_met", "first_evidence"] = "rule_met"

    @property
    def references(self) -> tuple[str, ...]:
        """Other conditions this one uses as evidence, sorted."""
        return tuple(sorted({e.condition for e in self.evidence.values() if e.condition}))


class DateRange(Model):
    """An inclusive calendar window."""

    between: tuple[dt.date, dt.date]

    @model_validator(mode="after")
    def _ordered(self) -> Self:
        if self.between[0] > self.between[1]:
            raise ValueError("the window ends before it starts")
        return self


class IndexRule(Model):
    """How each patient's index date is chosen."""

    first_encounter: DateRange


class AgeRange(Model):
    """Inclusive range of age in completed years."""

    between: tuple[NonNegativeInt, NonNegativeInt]

    @model_validator(mode="after")
    def _ordered(self) -> Self:
        if self.between[0] > self.between[1]:
            raise ValueError("the age range ends before it starts")
        return self


class Criterion(Model):
    """One eligibility step; exactly one key is set. Steps apply in the order written."""

    sex: tuple[Literal["F", "M"], ...] | None = None
    alive_at_index: Literal[True] | None = None
    age: AgeRange | None = None
    history_days: NonNegativeInt | None = None
    at_risk_of_any_outcome: Literal[True] | None = None

    @model_validator(mode="after")
    def _exactly_one(self) -> Self:
        if len(self.model_fields_set) != 1:
            raise ValueError(
                "each eligibility step sets exactly one of: " + ", ".join(Criterion.model_fields)
            )
        return self

    @property
    def kind(self) -> str:
        """The name of the key this step sets."""
        return next(iter(self.model_fields_set))


class Outcomes(Model):
    """The conditions followed for incidence, side by side."""

    conditions: tuple[Name, ...] = Field(min_length=1)
    horizon_days: PositiveInt
    lookback: Literal["all"] = "all"

    @field_validator("conditions")
    @classmethod
    def _unique(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        repeated = sorted({c for c in value if value.count(c) > 1})
        if repeated:
            raise ValueError(f"outcome listed twice: {', '.join(repeated)}")
        return value


FollowupEnd = Literal["death", "end_of_data", "lost_contact", "horizon"]


class Followup(Model):
    """What ends follow-up; the order of ``end_at`` breaks ties between reasons."""

    end_at: tuple[FollowupEnd, ...] = ("death", "end_of_data", "lost_contact", "horizon")
    lost_contact_after_days: NonNegativeInt | None = None
    incomplete: Literal["censor"] = "censor"

    @model_validator(mode="after")
    def _consistent(self) -> Self:
        if len(set(self.end_at)) != len(self.end_at):
            raise ValueError("a follow-up end reason is listed twice")
        if "horizon" not in self.end_at:
            raise ValueError("follow-up must end at the horizon: add 'horizon' to end_at")
        if ("lost_contact" in self.end_at) != (self.lost_contact_after_days is not None):
            raise ValueError("lost_contact in end_at and lost_contact_after_days go together")
        return self


class Output(Model):
    """Where results go and which counts are too small to show."""

    folder: Path
    small_cell_threshold: PositiveInt = 5


class EngineSettings(Model):
    """Engine resources; the command line can override them."""

    threads: PositiveInt | None = None
    memory_limit: (
        Annotated[str, Field(pattern=r"^\d+(\.\d+)?\s*(KB|MB|GB|TB|KiB|MiB|GiB|TiB)$")] | None
    ) = None


class Covariate(Model):
    """One baseline covariate column of the analysis table; exactly one key is set.

    ``condition``: true when the named condition's onset is on or before the index date.
    """

    condition: Name | None = None

    @model_validator(mode="after")
    def _exactly_one(self) -> Self:
        if len(self.model_fields_set) != 1:
            raise ValueError(
                "each covariate sets exactly one of: " + ", ".join(Covariate.model_fields)
            )
        return self


RESERVED_COLUMNS = ("patient_id", "index_date", "age_at_index", "sex")


class Study(Model):
    """A study design: source, index, eligibility, outcomes, follow-up and output."""

    study: Name
    title: str
    extract: Path
    definitions: Path = Path("../conditions")
    end_of_data: dt.date
    index: IndexRule
    eligibility: tuple[Criterion, ...] = ()
    covariates: dict[Name, Covariate] = Field(default_factory=dict)
    outcomes: Outcomes
    followup: Followup
    output: Output
    engine: EngineSettings = EngineSettings()

    @field_validator("covariates")
    @classmethod
    def _no_reserved_names(cls, value: dict[str, Covariate]) -> dict[str, Covariate]:
        clash = sorted(set(value) & set(RESERVED_COLUMNS))
        if clash:
            raise ValueError(f"covariate name(s) {', '.join(clash)} are analysis-table columns")
        return value

    @model_validator(mode="after")
    def _index_within_data(self) -> Self:
        if self.index.first_encounter.between[1] > self.end_of_data:
            raise ValueError("the index window ends after end_of_data")
        return self
