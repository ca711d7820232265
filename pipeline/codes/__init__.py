"""Code normalisation, prefix expansion, code shapes (ICD-9, ICD-10, ATC), Charlson codes."""

from pipeline.codes._charlson import (
    CHARLSON_CATEGORIES,
    HIERARCHY,
    WEIGHTS,
    CharlsonCategory,
    charlson_score,
)
from pipeline.codes._normalise import expand_code, expand_codes, normalise_code, normalised_code_sql
from pipeline.codes._shapes import SHAPES, check_code

__all__ = [
    "CHARLSON_CATEGORIES",
    "HIERARCHY",
    "SHAPES",
    "WEIGHTS",
    "CharlsonCategory",
    "charlson_score",
    "check_code",
    "expand_code",
    "expand_codes",
    "normalise_code",
    "normalised_code_sql",
]
