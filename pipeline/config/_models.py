"""Pydantic models of condition files and study files.

The vocabulary is ours (see DESIGN.md). Every model forbids unknown keys, so a typo is an error
with a suggestion instead of a silently ignored setting.
"""

from __future__ import annotations

import datetime as dt
import re
from pathlib import Path
from typing import Annotated, Literal, Self

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from pipeline.measures import MEASURES, Threshold

NonNegativeInt = Annotated[int, Field(ge=0)]
PositiveInt = Annotated[int, Field(ge=1)]
Name = Annotated[str, Field(pattern=r"^[a-z][a-z0-9_]*$", max_length=48)]

_CODE_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9. ]*(-[A-Za-z0-9][A-Za-z0-9. ]*)?$")


class Model(BaseModel):
    """Base of every config model: unknown keys are errors, values are immutable."""

    model_config = ConfigDict(extra="forbid", frozen=True)


def _check_codes(codes: tuple[str, ...]) -> tuple[str, ...]:
    for code in codes:
        if not _CODE_PATTERN.match(code):
            raise ValueError(f"'{code}' is not a code, a prefix or a range such as 'I10-I15'")
    return codes


class DiagnosisCodes(Model):
    """Code prefixes (or ranges) per system, as written in a definition."""

    ICD9: tuple[str, ...] = ()
    ICD10: tuple[str, ...] = ()

    _codes = field_validator("ICD9", "ICD10")(_check_codes)


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
    """Prescriptions whose WHO ATC code starts with one of the prefixes."""

    atc: tuple[str, ...] = Field(min_length=1)
    exclude: tuple[str, ...] = ()

    _codes = field_validator("atc", "exclude")(_check_codes)


class MeasurementEvidence(Model):
    """Measurements of one measure compared with a threshold written with its unit."""

    measure: str
    at_least: str | float | None = None
    above: str | float | None = None
    below: str | float | None = None
    at_most: str | float | None = None

    @field_validator("measure")
    @classmethod
    def _known_measure(cls, value: str) -> str:
        if value not in MEASURES:
            raise ValueError(f"unknown measure '{value}'; known: {', '.join(sorted(MEASURES))}")
        return value

    def thresholds(self) -> tuple[Threshold, ...]:
        """Return the thresholds in canonical units (they were checked at load time)."""
        return tuple(
            Threshold.parse(self.measure, comparison, text)
            for comparison, text in (
                ("at_least", self.at_least),
                ("above", self.above),
                ("below", self.below),
                ("at_most", self.at_most),
            )
            if text is not None
        )

    @model_validator(mode="after")
    def _valid_thresholds(self) -> Self:
        if not self.thresholds():
            raise ValueError("a measurement needs at least one of at_least, above, below, at_most")
        return self


class Evidence(Model):
    """One named piece of evidence: exactly one kind of extract row that counts."""

    diagnosis: DiagnosisEvidence | None = None
    prescription: PrescriptionEvidence | None = None
    measurement: MeasurementEvidence | None = None

    @model_validator(mode="after")
    def _exactly_one_kind(self) -> Self:
        kinds = [k for k in ("diagnosis", "prescription", "measurement") if getattr(self, k)]
        if len(kinds) != 1:
            raise ValueError(
                "evidence needs exactly one of diagnosis, prescription, measurement"
                + (f" (got {', '.join(kinds)})" if kinds else "")
            )
        return self


class Rule(Model):
    """A way the evidence makes a case: counts of evidence met inside a window."""

    name: str
    need: dict[str, PositiveInt] = Field(min_length=1)
    distinct_days: bool = False
    within_days: NonNegativeInt | None = None
    apart_at_least_days: NonNegativeInt | None = None

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
        return self


class Condition(Model):
    """A case definition: named evidence and the rules that turn it into a case."""

    condition: Name
    title: str
    about: str
    evidence: dict[Name, Evidence] = Field(min_length=1)
    rules: tuple[Rule, ...] = Field(min_length=1)
    onset: Literal["rule_met", "first_evidence"] = "rule_met"


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


class Study(Model):
    """A study design: source, index, eligibility, outcomes, follow-up and output."""

    study: Name
    title: str
    extract: Path
    definitions: Path = Path("../conditions")
    end_of_data: dt.date
    index: IndexRule
    eligibility: tuple[Criterion, ...] = ()
    outcomes: Outcomes
    followup: Followup
    output: Output
    engine: EngineSettings = EngineSettings()
