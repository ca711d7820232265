"""Code systems: normalisation, prefix expansion, shapes, SNOMED CT checks, Charlson codes."""

from pipeline.codes._charlson import (
    CHARLSON_CATEGORIES,
    HIERARCHY,
    WEIGHTS,
    CharlsonCategory,
    charlson_score,
)
from pipeline.codes._normalise import (
    expand_code,
    expand_codes,
    normalise_code,
    normalise_in,
    normalised_code_sql,
    prefixes_in,
    read2_code_sql,
)
from pipeline.codes._shapes import (
    DIAGNOSIS_SYSTEMS,
    EXTRACT_PATTERNS,
    SHAPES,
    SYSTEM_NAMES,
    check_code,
)
from pipeline.codes._snomed import (
    HierarchyError,
    descendants,
    read_hierarchy,
    verhoeff_check_digit,
    verhoeff_valid,
)

__all__ = [
    "CHARLSON_CATEGORIES",
    "DIAGNOSIS_SYSTEMS",
    "EXTRACT_PATTERNS",
    "HIERARCHY",
    "SHAPES",
    "SYSTEM_NAMES",
    "WEIGHTS",
    "CharlsonCategory",
    "HierarchyError",
    "charlson_score",
    "check_code",
    "descendants",
    "expand_code",
    "expand_codes",
    "normalise_code",
    "normalise_in",
    "normalised_code_sql",
    "prefixes_in",
    "read2_code_sql",
    "read_hierarchy",
    "verhoeff_check_digit",
    "verhoeff_valid",
]
