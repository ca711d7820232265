"""The extract: locating its tables (folders, FHIR exports, site mappings), checking columns."""

from pipeline.extract._discover import ExtractTable, extract_location
from pipeline.extract._mapped import discover_extract

__all__ = ["ExtractTable", "discover_extract", "extract_location"]
