"""The measures the tool understands: canonical units, accepted spellings, plausible ranges.

The measures themselves are data: one YAML file each under ``definitions/measures/`` (shipped)
or in a study's own measures folder, read by ``pipeline.config`` into a
:class:`MeasureRegistry`. This module holds their shape and what stays built in: which
measures are derived from which (eGFR by CKD-EPI 2021, BMI from weight and height), and the
canonical units those formulas are written for.

Every unit conversion is linear (``canonical = factor * value / divisor + offset``), which
keeps the conversion a small lookup table the compiler can join against instead of a chain of
CASEs. Units a measure does not list are never guessed: such values are not used.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

from pipeline.measures._threshold import Comparison, Threshold, parse_quantity


@dataclass(frozen=True)
class UnitConversion:
    """How one spelling of a unit converts: ``canonical = factor * value / divisor + offset``.

    A divisor keeps conversions such as creatinine (umol/L / 88.42) exact to the last bit.
    """

    spelling: str
    factor: float
    offset: float = 0.0
    divisor: float = 1.0

    def to_canonical(self, value: float) -> float:
        """Convert a value in this unit to the canonical unit, as the engine does."""
        return self.factor * value / self.divisor + self.offset


@dataclass(frozen=True)
class Measure:
    """A measurement the extract may carry, with its canonical unit.

    Attributes:
        name: The value of ``measure`` in the extract.
        canonical_unit: The unit every value is converted to ("" for a coded measure).
        units: Accepted spellings (compared after trimming, case kept) and their conversions.
        plausible: Inclusive range of canonical values that are used; others are set aside.
        categories: For a coded measure (smoking status), the accepted values of
            ``value_text``, compared lower-cased; numeric measures have none.
        codes: (system, code) pairs that name the measure in coded sources (LOINC, local).
    """

    name: str
    canonical_unit: str
    units: tuple[UnitConversion, ...]
    plausible: tuple[float, float]
    categories: tuple[str, ...] = ()
    codes: tuple[tuple[str, str], ...] = ()

    @property
    def is_coded(self) -> bool:
        """Whether the measure takes categories rather than numbers."""
        return bool(self.categories)

    def conversion(self, spelling: str) -> UnitConversion | None:
        """Return the conversion for a unit spelling, or None when it is not accepted."""
        wanted = spelling.strip()
        return next((u for u in self.units if u.spelling == wanted), None)

    def threshold(self, comparison: Comparison, text: str | float) -> Threshold:
        """Parse a threshold written for this measure and convert it to the canonical unit.

        Raises:
            ValueError: A missing unit, or one this measure does not accept.
        """
        value, unit = (float(text), None) if isinstance(text, int | float) else parse_quantity(text)
        if unit is None:
            raise ValueError(
                f"the threshold {value:g} needs a unit, e.g. '{value:g} {self.canonical_unit}'"
            )
        conversion = self.conversion(unit)
        if conversion is None:
            accepted = ", ".join(u.spelling for u in self.units)
            raise ValueError(
                f"unit '{unit}' cannot be converted for {self.name}; accepted: {accepted}"
            )
        return Threshold(comparison, round(conversion.to_canonical(value), 10), f"{value:g} {unit}")


@dataclass(frozen=True)
class MeasureRegistry:
    """Every measure a study may read, with the files they were defined in.

    Attributes:
        measures: Measure name -> measure.
        files: Measure name -> the YAML file that defined it (for errors and the manifest).
    """

    measures: Mapping[str, Measure]
    files: Mapping[str, Path]

    def __contains__(self, name: object) -> bool:
        return name in self.measures

    def __getitem__(self, name: str) -> Measure:
        return self.measures[name]

    def get(self, name: str) -> Measure | None:
        """The measure called ``name``, or None."""
        return self.measures.get(name)

    def names(self) -> list[str]:
        """Every measure name, sorted."""
        return sorted(self.measures)

    def known(self, name: str) -> Measure:
        """The measure called ``name``.

        Raises:
            ValueError: No measure has that name (the message lists the known ones).
        """
        measure = self.measures.get(name)
        if measure is None:
            raise ValueError(f"unknown measure '{name}'; known: {', '.join(self.names())}")
        return measure

    def threshold(self, name: str, comparison: Comparison, text: str | float) -> Threshold:
        """Parse a threshold written for the measure ``name`` (see :meth:`Measure.threshold`).

        >>> from pipeline.config import shipped_measures
        >>> shipped_measures().threshold("hba1c", "at_least", "48 mmol/mol").canonical_value
        6.54304

        Raises:
            ValueError: Unknown measure, missing or non-convertible unit.
        """
        return self.known(name).threshold(comparison, text)

    def conversion_rows(self) -> list[tuple[str, str, float, float, float, float, float]]:
        """Return (measure, unit spelling, factor, divisor, offset, low, high) per unit.

        The compiler turns these rows into a small literal table that measurements are
        joined to; measures in name order, units in the order their file lists them.
        """
        return [
            (m.name, u.spelling, u.factor, u.divisor, u.offset, m.plausible[0], m.plausible[1])
            for m in sorted(self.measures.values(), key=lambda m: m.name)
            for u in m.units
            if not m.is_coded
        ]


# Measures the engine can derive when they are not reported, and what from.
DERIVED_FROM: dict[str, tuple[str, ...]] = {
    "egfr": ("creatinine",),  # CKD-EPI 2021, on days without a usable reported eGFR
    "bmi": ("weight", "height"),  # weight / (latest height in m)^2, on days without a BMI
}

# The inputs each derivation reads on the day of the value it derives (the others, height, are
# read whatever their date).
SAME_DAY_INPUTS: dict[str, tuple[str, ...]] = {"egfr": ("creatinine",), "bmi": ("weight",)}

# The canonical units the built-in derivations are written for: CKD-EPI 2021 takes creatinine
# in mg/dL, BMI is kg over metres squared with height read in cm. A measure file may change
# these measures' spellings and ranges, not their canonical units.
DERIVATION_UNITS: dict[str, str] = {
    "creatinine": "mg/dL",
    "egfr": "mL/min/1.73m2",
    "weight": "kg",
    "height": "cm",
    "bmi": "kg/m2",
}
