"""Thresholds written in definitions, such as ``at_least: 6.5 %``.

A threshold is converted to the measure's canonical unit once, when the definition is loaded
(:meth:`pipeline.measures.Measure.threshold`), so the engine compares canonical values only.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Literal

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
    """A one-sided comparison against a value in the measure's canonical unit.

    Attributes:
        comparison: at_least, above, below or at_most.
        canonical_value: The limit in the measure's canonical unit.
        written: The threshold as its author wrote it (``6.5 mmol/mol``), for messages.
    """

    comparison: Comparison
    canonical_value: float
    written: str = ""
