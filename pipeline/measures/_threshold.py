"""Thresholds written in definitions, such as ``at_least: 6.5 %``.

A threshold is converted to the measure's canonical unit once, when the definition is loaded,
so the engine compares canonical values only.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Literal

from pipeline.measures._registry import MEASURES

Comparison = Literal["at_least", "above", "below", "at_most"]

_QUANTITY = re.compile(r"^\s*([-+]?\d+(?:\.\d+)?)\s*(\S.*?)?\s*$")


def parse_quantity(text: str) -> tuple[float, str | None]:
    """Split ``"6.5 %"`` into ``(6.5, "%")``; the unit is None when absent.

    >>> parse_quantity("60 mL/min/1.73m2")
    (60.0, 'mL/min/1.73m2')

    Raises:
        ValueError: The text does not start with a number.
    """
    match = _QUANTITY.match(text)
    if not match:
        raise ValueError(f"'{text}' is not a number followed by a unit")
    return float(match.group(1)), match.group(2)


@dataclass(frozen=True)
class Threshold:
    """A one-sided comparison against a value in the measure's canonical unit."""

    comparison: Comparison
    canonical_value: float

    @classmethod
    def parse(cls, measure: str, comparison: Comparison, text: str | float) -> Threshold:
        """Parse a threshold written for ``measure`` and convert it to the canonical unit.

        >>> Threshold.parse("hba1c", "at_least", "48 mmol/mol").canonical_value
        6.54304

        Raises:
            ValueError: Unknown measure, missing or non-convertible unit.
        """
        known = MEASURES.get(measure)
        if known is None:
            raise ValueError(f"unknown measure '{measure}'; known: {', '.join(sorted(MEASURES))}")
        value, unit = (float(text), None) if isinstance(text, int | float) else parse_quantity(text)
        if unit is None:
            raise ValueError(
                f"the threshold {value:g} needs a unit, e.g. '{value:g} {known.canonical_unit}'"
            )
        conversion = known.conversion(unit)
        if conversion is None:
            accepted = ", ".join(u.spelling for u in known.units)
            raise ValueError(
                f"unit '{unit}' cannot be converted for {measure}; accepted: {accepted}"
            )
        return cls(comparison, round(conversion.to_canonical(value), 10))
