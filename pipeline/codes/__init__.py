"""Code normalisation and prefix expansion (ICD-9, ICD-10, WHO ATC)."""

from pipeline.codes._normalise import expand_code, expand_codes, normalise_code, normalised_code_sql

__all__ = ["expand_code", "expand_codes", "normalise_code", "normalised_code_sql"]
