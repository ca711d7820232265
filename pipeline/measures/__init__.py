"""Measures, units and plausibility ranges (the measures themselves are YAML files)."""

from pipeline.measures._registry import (
    DERIVATION_UNITS,
    DERIVED_FROM,
    SAME_DAY_INPUTS,
    Measure,
    MeasureRegistry,
    UnitConversion,
)
from pipeline.measures._threshold import Comparison, Threshold, parse_quantity

__all__ = [
    "DERIVATION_UNITS",
    "DERIVED_FROM",
    "SAME_DAY_INPUTS",
    "Comparison",
    "Measure",
    "MeasureRegistry",
    "Threshold",
    "UnitConversion",
    "parse_quantity",
]
