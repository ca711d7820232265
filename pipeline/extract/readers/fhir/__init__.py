"""The FHIR R4 bulk-data reader: an export's NDJSON files read as the canonical tables.

Its public surface: :func:`discover_fhir` groups an export's files into tables (names only),
:func:`fhir_source` gives a table's rows as a SELECT the engines bind, and the codes, systems
and statuses it knows, for the writers that must produce what it reads
(:mod:`pipeline.synth`) and the tests. How resources map to rows is told in
:mod:`~pipeline.extract.readers.fhir._resources`; how lines are read in
:mod:`~pipeline.extract.readers.fhir._read`.
"""

from pipeline.extract.readers.fhir._codes import (
    ATC_SYSTEM,
    ICD_SYSTEMS,
    LOINC_MEASURES,
    LOINC_SYSTEM,
    READER_REASONS,
    SNOMED_SMOKING,
    SNOMED_SYSTEM,
    STATUS_SET_ASIDE,
    UCUM_SYSTEM,
)
from pipeline.extract.readers.fhir._files import (
    FHIR_COLUMNS,
    FHIR_RESOURCES,
    discover_fhir,
    ndjson_files,
)
from pipeline.extract.readers.fhir._resources import BUILDERS, fhir_source

__all__ = [
    "ATC_SYSTEM",
    "BUILDERS",
    "FHIR_COLUMNS",
    "FHIR_RESOURCES",
    "ICD_SYSTEMS",
    "LOINC_MEASURES",
    "LOINC_SYSTEM",
    "READER_REASONS",
    "SNOMED_SMOKING",
    "SNOMED_SYSTEM",
    "STATUS_SET_ASIDE",
    "UCUM_SYSTEM",
    "discover_fhir",
    "fhir_source",
    "ndjson_files",
]
