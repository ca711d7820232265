"""The extract: locating its tables (folders, FHIR exports, site mappings, databases)."""

from pipeline.extract._dbread import DatabaseFacts, OpenedExtract, database_source, open_extract
from pipeline.extract._dbsource import as_extract, is_database_uri
from pipeline.extract._discover import ExtractPath, ExtractTable, extract_location
from pipeline.extract._hadoop import HadoopFiles, HadoopPath, is_hadoop_uri
from pipeline.extract._mapped import discover_extract

__all__ = [
    "DatabaseFacts",
    "ExtractPath",
    "ExtractTable",
    "HadoopFiles",
    "HadoopPath",
    "OpenedExtract",
    "as_extract",
    "database_source",
    "discover_extract",
    "extract_location",
    "is_database_uri",
    "is_hadoop_uri",
    "open_extract",
]
