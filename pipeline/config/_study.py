"""Pydantic models of study files: index, eligibility, covariates, outcomes, follow-up.

Windows are written as two day offsets relative to the index date, both included:
``window: [-365, -1]`` is the year before index without the index day; ``[null, 0]`` (the
default) is all history up to and including the index date.
"""

from __future__ import annotations

import datetime as dt
import re
from pathlib import Path
from typing import Annotated, Literal, Self
from urllib.parse import urlsplit
from urllib.request import url2pathname

from pydantic import Field, ValidationInfo, field_validator, model_validator

from pipeline.config._base import ONE_OR_MORE, Model, Name, NonNegativeInt, PositiveInt
from pipeline.config._condition import Evidence
from pipeline.config._exposure import Exposure
from pipeline.config._localcodes import LocalCodeTables
from pipeline.config._matching import Matching
from pipeline.config._measure import measures_in
from pipeline.config._persontime import PersonTime
from pipeline.config._settings import EngineSettings, Output, QualitySettings
from pipeline.config._spark import SparkSettings

_DATABASE_URI = re.compile(r"^postgres(?:ql)?://", re.IGNORECASE)
# Any other URI but file:// names an extract on a Hadoop file system, read through Spark.
_FILE_SYSTEM_URI = re.compile(r"^(?!file:)[a-z][a-z0-9+.-]+://", re.IGNORECASE)

Window = tuple[int | None, int]


def _check_window(window: Window | None) -> Window | None:
    if window is None:
        return None
    start, end = window
    if end > 0:
        raise ValueError(
            f"the window ends {end} days after the index date; baseline windows must end on or "
            "before the index date (0)"
        )
    if start is not None and start > end:
        raise ValueError(f"the window starts ({start}) after it ends ({end})")
    return window


def _exactly_one(model: Model, kinds: tuple[str, ...], what: str) -> None:
    chosen = [k for k in kinds if getattr(model, k) is not None]
    if len(chosen) != 1:
        raise ValueError(f"{what} sets exactly one of: {', '.join(kinds)}")


def _plain_evidence(evidence: Evidence | None) -> Evidence | None:
    if evidence is not None and evidence.condition is not None:
        raise ValueError("use 'condition:' at this level, not inside evidence")
    return evidence


class DateRange(Model):
    """An inclusive calendar window."""

    between: tuple[dt.date, dt.date]

    @model_validator(mode="after")
    def _ordered(self) -> Self:
        if self.between[0] > self.between[1]:
            raise ValueError("the window ends before it starts")
        return self


class FirstEncounter(DateRange):
    """Index at the first encounter in the window, optionally of some types only."""

    type: Annotated[tuple[str, ...], ONE_OR_MORE] = ()


class FirstEvent(DateRange):
    """Index at the first qualifying event in the window: evidence, or a condition's onset."""

    evidence: Evidence | None = None
    condition: Name | None = None

    _plain = field_validator("evidence")(classmethod(lambda cls, v: _plain_evidence(v)))

    @model_validator(mode="after")
    def _one_source(self) -> Self:
        _exactly_one(self, ("evidence", "condition"), "first_event")
        return self


class RandomEncounter(DateRange):
    """Index at one encounter in the window drawn per patient; the seed makes it repeatable."""

    seed: int


class IndexRule(Model):
    """How each patient's index date is chosen; exactly one strategy is set."""

    first_encounter: FirstEncounter | None = None
    fixed_date: dt.date | None = None
    first_event: FirstEvent | None = None
    random_encounter: RandomEncounter | None = None
    exposure_start: DateRange | None = None

    @model_validator(mode="after")
    def _one_strategy(self) -> Self:
        _exactly_one(self, STRATEGIES, "index")
        return self

    @property
    def strategy(self) -> str:
        """The strategy's key."""
        return next(k for k in STRATEGIES if getattr(self, k) is not None)

    @property
    def possible(self) -> tuple[dt.date, dt.date]:
        """The earliest and latest dates an index can fall on."""
        if self.fixed_date is not None:
            return self.fixed_date, self.fixed_date
        window = (
            self.first_encounter or self.first_event or self.random_encounter or self.exposure_start
        )
        assert window is not None  # one strategy is set (checked above)
        return window.between


# exposure_start: the first record of an exposure group in the window (``exposure:`` section).
STRATEGIES = ("first_encounter", "fixed_date", "first_event", "random_encounter", "exposure_start")


class AgeRange(Model):
    """Inclusive range of age in completed years."""

    between: tuple[NonNegativeInt, NonNegativeInt]

    @model_validator(mode="after")
    def _ordered(self) -> Self:
        if self.between[0] > self.between[1]:
            raise ValueError("the age range ends before it starts")
        return self


class EncounterCount(Model):
    """At least ``at_least`` encounters inside a window relative to index."""

    at_least: PositiveInt
    window: Window

    _window = field_validator("window")(classmethod(lambda cls, v: _check_window(v)))


class EvidenceInWindow(Model):
    """Evidence inside a window relative to index (all history up to index by default)."""

    evidence: Evidence
    window: Window = (None, 0)

    _window = field_validator("window")(classmethod(lambda cls, v: _check_window(v)))
    _plain = field_validator("evidence")(classmethod(lambda cls, v: _plain_evidence(v)))


class ContactWindow(Model):
    """A window relative to index in which the patient must have had a contact."""

    window: Window

    _window = field_validator("window")(classmethod(lambda cls, v: _check_window(v)))


class Criterion(Model):
    """One eligibility step; exactly one key is set. Steps apply in the order written."""

    sex: Annotated[tuple[Literal["F", "M"], ...], ONE_OR_MORE] | None = None
    alive_at_index: Literal[True] | None = None
    age: AgeRange | None = None
    history_days: NonNegativeInt | None = None
    registered_days: NonNegativeInt | None = None
    encounters: EncounterCount | None = None
    practice: Annotated[tuple[str, ...], ONE_OR_MORE] | None = None
    not_prevalent: Name | None = None
    no_evidence: EvidenceInWindow | None = None
    at_risk_of_any_outcome: Literal[True] | None = None
    in_contact_at_index: ContactWindow | None = None

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
    """The conditions followed for incidence, side by side, and the horizon.

    ``lookback`` (for every outcome) and ``lookback_by_outcome`` limit the evidence that can make
    a patient prevalent: with N days, only evidence dated on or after index - N counts for that
    outcome, so its onset is the first date a rule is met from that evidence on.
    """

    conditions: Annotated[tuple[Name, ...], ONE_OR_MORE, Field(min_length=1)]
    horizon_days: PositiveInt | None = None
    horizon_years: PositiveInt | None = None
    lookback: Literal["all"] | PositiveInt = "all"
    lookback_by_outcome: dict[Name, Literal["all"] | PositiveInt] = Field(default_factory=dict)
    clear_before: dict[Name, PositiveInt] = Field(default_factory=dict)

    def clear_before_for(self, outcome: str) -> int | None:
        """Days before index in which any evidence of the outcome means not at risk, or None."""
        return self.clear_before.get(outcome)

    def lookback_for(self, outcome: str) -> int | None:
        """Days of look-back for an outcome's prevalence; None means all history."""
        chosen = self.lookback_by_outcome.get(outcome, self.lookback)
        return None if chosen == "all" else int(chosen)

    @field_validator("conditions")
    @classmethod
    def _unique(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        repeated = sorted({c for c in value if value.count(c) > 1})
        if repeated:
            raise ValueError(f"outcome listed twice: {', '.join(repeated)}")
        return value

    @model_validator(mode="after")
    def _lookback_names_outcomes(self) -> Self:
        for key in ("lookback_by_outcome", "clear_before"):
            unknown = sorted(set(getattr(self, key)) - set(self.conditions))
            if unknown:
                raise ValueError(f"{key} names non-outcomes: {', '.join(unknown)}")
        return self

    @model_validator(mode="after")
    def _one_horizon(self) -> Self:
        if self.horizon_days is None and self.horizon_years is None:
            raise ValueError("the horizon is missing: give horizon_days or horizon_years")
        if self.horizon_days is not None and self.horizon_years is not None:
            raise ValueError("give the horizon once: horizon_days or horizon_years, not both")
        return self


FollowupEnd = Literal["death", "end_of_data", "lost_contact", "deregistration", "horizon"]


class Followup(Model):
    """What ends follow-up; the order of ``end_at`` breaks ties between reasons.

    ``contact`` says what counts as contact with the practice, for loss of contact and the
    ``in_contact_at_index`` step: ``encounters`` (usable encounters only) or ``any_activity``
    (any row of encounters, diagnoses, prescriptions or measurements with a usable date, whatever
    its code or value: a prescription after the last encounter is still contact).

    ``incomplete: exclude`` removes patients whose follow-up ends before the horizon for a
    reason other than death (one more attrition line); ``censor`` keeps them.
    """

    end_at: Annotated[tuple[FollowupEnd, ...], ONE_OR_MORE] = (
        "death",
        "end_of_data",
        "lost_contact",
        "horizon",
    )
    lost_contact_after_days: NonNegativeInt | None = None
    incomplete: Literal["censor", "exclude"] = "censor"
    contact: Literal["encounters", "any_activity"] = "encounters"

    @model_validator(mode="after")
    def _consistent(self) -> Self:
        if len(set(self.end_at)) != len(self.end_at):
            raise ValueError("a follow-up end reason is listed twice")
        if "horizon" not in self.end_at:
            raise ValueError("follow-up must end at the horizon: add 'horizon' to end_at")
        if ("lost_contact" in self.end_at) != (self.lost_contact_after_days is not None):
            raise ValueError("lost_contact in end_at and lost_contact_after_days go together")
        return self


class CharlsonSpec(Model):
    """The Charlson index: which weights, and which code systems' Quan (2005) lists to use."""

    weights: Literal["charlson_1987", "quan_2011"]
    codes: Annotated[tuple[Literal["ICD10", "ICD9"], ...], ONE_OR_MORE] = ("ICD10", "ICD9")

    @field_validator("codes")
    @classmethod
    def _some_codes(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        if not value:
            raise ValueError("name at least one code system")
        return value


class Covariate(Model):
    """One baseline covariate of the analysis table; exactly one kind key is set.

    - ``condition``: true when the condition's onset is on or before the index date;
    - ``latest`` / ``mean`` / ``minimum`` / ``maximum``: a measure's values in ``window``
      (``latest`` also gives the value's date, and for eGFR and BMI whether it was derived);
    - ``count``: evidence rows in ``window`` (0 when none);
    - ``days_since_first_evidence``: days from a condition's first evidence to index;
    - ``charlson``: the Charlson index from Quan 2005 codes over all history, with the weights.

    ``label`` is how tables for readers (Table 1 of the report) name the covariate, e.g.
    "BMI, latest in the two years before index, kg/m²"; without it they use the column's
    documented meaning and unit (measure, window, unit), from the data dictionary.
    """

    label: str | None = Field(default=None, min_length=1, max_length=200)
    condition: Name | None = None
    latest: str | None = None
    mean: str | None = None
    minimum: str | None = None
    maximum: str | None = None
    count: Evidence | None = None
    days_since_first_evidence: Name | None = None
    charlson: CharlsonSpec | None = None
    window: Window | None = None

    _window = field_validator("window")(classmethod(lambda cls, v: _check_window(v)))
    _plain = field_validator("count")(classmethod(lambda cls, v: _plain_evidence(v)))

    @field_validator("latest", "mean", "minimum", "maximum")
    @classmethod
    def _numeric_measure(cls, value: str | None, info: ValidationInfo) -> str | None:
        if value is None:
            return None
        measure = measures_in(info).known(value)
        if measure.is_coded:
            raise ValueError(
                f"{value} is a coded measure with no canonical unit; only numeric measures "
                "have values to summarise"
            )
        return value

    @model_validator(mode="after")
    def _one_kind(self) -> Self:
        _exactly_one(self, COVARIATE_KINDS, "each covariate")
        if self.window is not None and self.kind not in WINDOWED_KINDS:
            raise ValueError(f"window applies to {', '.join(WINDOWED_KINDS)} only")
        return self

    @property
    def kind(self) -> str:
        """The covariate's kind key."""
        return next(k for k in COVARIATE_KINDS if getattr(self, k) is not None)

    @property
    def span(self) -> Window:
        """The window, all history up to index when not given."""
        return self.window or (None, 0)


COVARIATE_KINDS = (
    "condition",
    "latest",
    "mean",
    "minimum",
    "maximum",
    "count",
    "days_since_first_evidence",
    "charlson",
)
WINDOWED_KINDS = ("latest", "mean", "minimum", "maximum", "count")


class RuleChange(Model):
    """New window settings for one rule of a definition, used by one study only."""

    within_days: NonNegativeInt | None = None
    apart_at_least_days: NonNegativeInt | None = None
    distinct_days: bool | None = None


RESERVED_COLUMNS = ("patient_id", "index_date", "age_at_index", "sex")


class Study(Model):
    """A study design: source, index, eligibility, outcomes, follow-up and output.

    ``definitions`` is the folder of condition files, relative to the study file;
    ``library: true`` instead reads the definition library installed with ascertain, so a
    study copied anywhere still finds its definitions. ``definition_changes`` adjusts a
    definition's rule windows for this study only, by condition and rule name, without
    copying the definition file. ``measures`` names the study's own measure files (folders of
    ``*.yaml``, or files, relative to the study file), read beside the shipped measures.
    ``local_codes`` names tables of the extract's own product and lab test codes
    (:mod:`pipeline.config._localcodes`).
    """

    study: Name
    title: str
    extract: Path | str
    definitions: Path = Path("../conditions")
    library: bool = False
    measures: Annotated[tuple[Path, ...], ONE_OR_MORE] = ()
    local_codes: LocalCodeTables | None = None
    definition_changes: dict[Name, dict[str, RuleChange]] = Field(default_factory=dict)
    end_of_data: dt.date
    index: IndexRule
    eligibility: tuple[Criterion, ...] = ()
    covariates: dict[Name, Covariate] = Field(default_factory=dict)
    outcomes: Outcomes
    followup: Followup
    output: Output
    engine: EngineSettings = EngineSettings()
    spark: SparkSettings = SparkSettings()
    quality: QualitySettings = QualitySettings()
    persontime: PersonTime | None = None
    matching: Matching | None = None
    exposure: Exposure | None = None

    @field_validator("extract", mode="before")
    @classmethod
    def _path_or_uri(cls, value: object) -> object:
        # A database connection URI, or an hdfs:// (s3a://, ...) one, stays text (a path would
        # fold its "//"); a file:// URI is its local path; the rest is a path.
        if isinstance(value, str) and value.lower().startswith("file://"):
            parsed = urlsplit(value)
            if parsed.netloc not in ("", "localhost"):
                raise ValueError(
                    f"a file:// URI names a path on this machine, not on host '{parsed.netloc}' "
                    "(write file:///path)"
                )
            return Path(url2pathname(parsed.path))
        if isinstance(value, str) and not _DATABASE_URI.match(value):
            return value if _FILE_SYSTEM_URI.match(value) else Path(value)
        return value

    @field_validator("covariates")
    @classmethod
    def _no_reserved_names(cls, value: dict[str, Covariate]) -> dict[str, Covariate]:
        clash = sorted(set(value) & set(RESERVED_COLUMNS))
        if clash:
            raise ValueError(f"covariate name(s) {', '.join(clash)} are analysis-table columns")
        return value

    @model_validator(mode="after")
    def _one_charlson_code_basis(self) -> Self:
        bases = {c.charlson.codes for c in self.covariates.values() if c.charlson}
        if len(bases) > 1:
            raise ValueError("Charlson covariates of one study must use the same code systems")
        return self

    @model_validator(mode="after")
    def _one_contact_step(self) -> Self:
        if sum(c.in_contact_at_index is not None for c in self.eligibility) > 1:
            raise ValueError("in_contact_at_index is given twice; one contact window per study")
        return self

    @model_validator(mode="after")
    def _index_within_data(self) -> Self:
        if self.index.possible[1] > self.end_of_data:
            raise ValueError("the index window ends after end_of_data")
        return self
