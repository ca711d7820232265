"""Measure files: one YAML file per measure, read into a :class:`MeasureRegistry`.

The shipped measures live in ``definitions/measures/`` (installed as ``pipeline.library``); a
study adds its own with ``measures: [folder or file, ...]``. A file says the measure's name,
its canonical unit, each accepted unit spelling with a linear conversion to the canonical unit
(``canonical = factor * value / divisor + offset``: nothing else, so a conversion is always one
row of a lookup table), the plausible range of canonical values, the codes that name it in
coded sources, and for a coded measure (smoking status) its categories::

    measure: urate
    title: Serum urate
    canonical_unit: umol/L
    plausible: [30, 1500]
    codes: {LOINC: ["3084-1"]}
    units:
      - {spellings: [umol/L, µmol/L]}
      - {spellings: [mg/dL], factor: 59.48, source: "molar mass 168.11 g/mol"}

A name may be defined once across every file a study reads, shipped or its own: a second
definition is an error naming both files, never a silent override.
"""

from __future__ import annotations

from collections.abc import Iterable
from functools import cache
from pathlib import Path
from typing import Annotated, Self

from pydantic import Field, ValidationInfo, field_validator, model_validator

from pipeline.config._base import ONE_OR_MORE, Model, Name
from pipeline.config._library import library_folder
from pipeline.config._yaml import load_yaml
from pipeline.errors import ConfigError, Problem
from pipeline.measures import DERIVATION_UNITS, Measure, MeasureRegistry, UnitConversion

LOINC_CODE = r"^[0-9]{1,7}-[0-9]$"  # digits, a hyphen, one check digit (LOINC's own form)


class UnitEntry(Model):
    """Spellings of one unit and how a value in it converts to the canonical unit."""

    spellings: Annotated[tuple[Annotated[str, Field(min_length=1)], ...], ONE_OR_MORE] = Field(
        min_length=1
    )
    factor: float = 1.0
    divisor: float = 1.0
    offset: float = 0.0
    source: str | None = None

    @field_validator("factor", "divisor")
    @classmethod
    def _positive(cls, value: float, info: ValidationInfo) -> float:
        if value <= 0:
            raise ValueError(f"{info.field_name} must be more than 0 (got {value:g})")
        return value

    @field_validator("spellings")
    @classmethod
    def _trimmed(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        for spelling in value:
            if spelling != spelling.strip():
                raise ValueError(
                    f"unit '{spelling}' has spaces around it; units are compared trimmed"
                )
        return value


class MeasureCodes(Model):
    """Codes naming the measure in coded sources: LOINC, and the site's own local codes."""

    LOINC: Annotated[tuple[Annotated[str, Field(pattern=LOINC_CODE)], ...], ONE_OR_MORE] = ()
    local: Annotated[tuple[Annotated[str, Field(min_length=1)], ...], ONE_OR_MORE] = ()


class MeasureFile(Model):
    """One measure file (see the module docstring)."""

    measure: Name
    title: Annotated[str, Field(min_length=1)]
    canonical_unit: str = ""
    units: tuple[UnitEntry, ...] = ()
    plausible: tuple[float, float] | None = None
    categories: Annotated[tuple[Annotated[str, Field(min_length=1)], ...], ONE_OR_MORE] = ()
    codes: MeasureCodes = MeasureCodes()
    source: str | None = None

    @field_validator("plausible")
    @classmethod
    def _ordered(cls, value: tuple[float, float] | None) -> tuple[float, float] | None:
        if value is not None and value[0] > value[1]:
            raise ValueError(
                f"the plausible range starts ({value[0]:g}) above where it ends ({value[1]:g})"
            )
        return value

    @field_validator("categories")
    @classmethod
    def _lower_case(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        for category in value:
            if category != category.strip().lower():
                raise ValueError(
                    f"category '{category}' must be written in lower case without spaces "
                    "around it (values are compared lower-cased)"
                )
        return value

    @model_validator(mode="after")
    def _numeric_or_coded(self) -> Self:
        if self.categories:
            if self.units or self.canonical_unit or self.plausible is not None:
                raise ValueError(
                    "a coded measure (with categories) has no canonical_unit, units or plausible"
                )
            return self
        if not self.canonical_unit or not self.units or self.plausible is None:
            raise ValueError(
                "a numeric measure needs canonical_unit, units and plausible (a coded one, "
                "categories)"
            )
        return self

    def to_measure(self) -> Measure:
        """The measure as the compiler reads it (numbers as floats, so SQL literals match)."""
        return Measure(
            name=self.measure,
            canonical_unit=self.canonical_unit,
            units=tuple(
                UnitConversion(s, float(u.factor), float(u.offset), float(u.divisor))
                for u in self.units
                for s in u.spellings
            ),
            plausible=(
                (float(self.plausible[0]), float(self.plausible[1]))
                if self.plausible
                else (0.0, 0.0)
            ),
            categories=self.categories,
            codes=tuple(
                [("LOINC", c) for c in self.codes.LOINC] + [("local", c) for c in self.codes.local]
            ),
        )


def _unit_problems(file: Path, entry: MeasureFile) -> list[Problem]:
    """A spelling listed twice, and a canonical unit that is not listed as itself."""
    doc = load_yaml(file)
    problems: list[Problem] = []
    seen: dict[str, int] = {}
    for i, unit in enumerate(entry.units):
        for j, spelling in enumerate(unit.spellings):
            if spelling in seen:
                problems.append(
                    doc.problem(
                        ("units", i, "spellings", j),
                        "duplicate-unit",
                        f"unit '{spelling}' is already listed in units[{seen[spelling]}] "
                        f"of measure '{entry.measure}'",
                        at_value=True,
                    )
                )
            seen.setdefault(spelling, i)
    if entry.canonical_unit and not problems:
        own = entry.to_measure().conversion(entry.canonical_unit)
        if own is None or (own.factor, own.divisor, own.offset) != (1.0, 1.0, 0.0):
            problems.append(
                doc.problem(
                    ("canonical_unit",),
                    "canonical-unit",
                    f"the canonical unit '{entry.canonical_unit}' must be listed under units "
                    "without a factor, divisor or offset (a value in it is kept as it is)",
                    at_value=True,
                )
            )
    wanted = DERIVATION_UNITS.get(entry.measure)
    if wanted is not None and entry.canonical_unit != wanted:
        problems.append(
            doc.problem(
                ("canonical_unit",),
                "derivation-unit",
                f"the built-in derivation of eGFR or BMI reads {entry.measure} in {wanted}; "
                f"its canonical unit must stay '{wanted}'",
                at_value=True,
            )
        )
    return problems


def load_measure_file(file: Path) -> Measure:
    """Load and check one measure file.

    Raises:
        ConfigError: Schema errors, a unit spelled twice, a canonical unit not listed.
    """
    from pipeline.config._document import validate_document  # it imports this module

    entry = validate_document(load_yaml(file), MeasureFile)
    problems = _unit_problems(file, entry)
    if problems:
        raise ConfigError(problems)
    return entry.to_measure()


def measure_files(paths: Iterable[Path]) -> list[Path]:
    """The ``*.yaml`` files of each folder (sorted) and each file, in the order given.

    Raises:
        ConfigError: A path that does not exist.
    """
    files: list[Path] = []
    for path in paths:
        if path.is_dir():
            files.extend(sorted(path.glob("*.yaml")))
        elif path.is_file():
            files.append(path)
        else:
            raise ConfigError(
                [Problem(path, 0, 0, "missing-folder", "no such measures file or folder")]
            )
    return files


def load_measures(files: Iterable[Path], base: MeasureRegistry | None = None) -> MeasureRegistry:
    """The measures of ``base`` (none by default) and of ``files``; all problems together.

    Raises:
        ConfigError: A file is invalid, or a name is defined twice (both files named).
    """
    measures = dict(base.measures) if base else {}
    defined_in = dict(base.files) if base else {}
    problems: list[Problem] = []
    for file in files:
        if file.resolve() in {f.resolve() for f in defined_in.values()}:
            continue  # named twice (a folder and a file in it, or the shipped folder): read once
        try:
            measure = load_measure_file(file)
        except ConfigError as err:
            problems.extend(err.problems)
            continue
        if measure.name in measures:
            problems.append(
                load_yaml(file).problem(
                    ("measure",),
                    "duplicate-measure",
                    f"measure '{measure.name}' is already defined in {defined_in[measure.name]}",
                    at_value=True,
                )
            )
            continue
        claimed = {
            code: other
            for other, known in measures.items()
            for system, code in known.codes
            if system == "LOINC"
        }
        taken = [c for s, c in measure.codes if s == "LOINC" and c in claimed]
        if taken:
            # A LOINC code names one measure: FHIR observations and local lab tables are read
            # by it, and two claimants would make the reading depend on file order.
            problems.append(
                load_yaml(file).problem(
                    ("codes", "LOINC"),
                    "duplicate-code",
                    f"LOINC code {taken[0]} is already the code of measure '{claimed[taken[0]]}' "
                    f"({defined_in[claimed[taken[0]]]})",
                )
            )
            continue
        measures[measure.name] = measure
        defined_in[measure.name] = file
    if problems:
        raise ConfigError(problems)
    return MeasureRegistry(measures, defined_in)


@cache
def shipped_measures() -> MeasureRegistry:
    """The measures shipped with ascertain (``definitions/measures/*.yaml``), read once.

    Cached: they are installed package data, the same for the life of the process.
    """
    return load_measures(measure_files([library_folder() / "measures"]))


MEASURES_CONTEXT = "measures"


def measures_in(info: ValidationInfo) -> MeasureRegistry:
    """The measures a model is validated against: the loader's (``context``), else shipped.

    The loader passes a study's registry (shipped measures and the study's own files) as the
    validation context; a definition validated alone knows the shipped measures only.
    """
    context = info.context
    if isinstance(context, dict) and MEASURES_CONTEXT in context:
        return context[MEASURES_CONTEXT]
    return shipped_measures()
