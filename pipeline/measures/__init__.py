"""Measures, units and plausibility ranges."""

from pipeline.measures._registry import (
    CREATININE_UMOL_PER_MG_DL,
    DERIVED_FROM,
    HBA1C_NGSP_INTERCEPT,
    HBA1C_NGSP_SLOPE,
    MEASURES,
    SAME_DAY_INPUTS,
    Measure,
    UnitConversion,
    conversion_rows,
)
from pipeline.measures._threshold import Threshold, parse_quantity

__all__ = [
    "CREATININE_UMOL_PER_MG_DL",
    "DERIVED_FROM",
    "HBA1C_NGSP_INTERCEPT",
    "HBA1C_NGSP_SLOPE",
    "MEASURES",
    "SAME_DAY_INPUTS",
    "Measure",
    "Threshold",
    "UnitConversion",
    "conversion_rows",
    "parse_quantity",
]
