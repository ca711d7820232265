"""Code normalisation, prefix expansion and code shapes (ICD-9, ICD-10, WHO ATC)."""

from pipeline.codes._normalise import expand_code, expand_codes, normalise_code, normalised_code_sql
from pipeline.codes._shapes import SHAPES, check_code

__all__ = [
    "SHAPES",
    "check_code",
    "expand_code",
    "expand_codes",
    "normalise_code",
    "normalised_code_sql",
]
