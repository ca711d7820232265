"""The extract: its canonical schema, where its tables are, and the readers for each kind.

Folders of canonical files, FHIR exports, site mappings and databases are located here; the
readers (:mod:`pipeline.extract.readers`) turn each kind into the canonical tables.

:mod:`pipeline.extract.schema` imports nothing of the package, so the configuration, the
compiler and the engines can all read it. To keep it so, this package loads its other modules
only when one of their names is first used (PEP 562): importing the schema never imports the
readers, which read mapping files through :mod:`pipeline.config`.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from pipeline.extract._dbread import (
        DatabaseFacts,
        OpenedExtract,
        database_source,
        open_extract,
    )
    from pipeline.extract._dbsource import as_extract, is_database_uri
    from pipeline.extract._discover import discover_extract, extract_location
    from pipeline.extract._hadoop import HadoopFiles, HadoopPath, is_hadoop_uri
    from pipeline.extract._table import ExtractPath, ExtractTable
    from pipeline.extract.readers.csv_parquet import table_function
    from pipeline.extract.readers.fhir import fhir_source
    from pipeline.extract.readers.mapped import source_column
    from pipeline.extract.schema import SourceTable

_WHERE = {
    "DatabaseFacts": "pipeline.extract._dbread",
    "ExtractPath": "pipeline.extract._table",
    "ExtractTable": "pipeline.extract._table",
    "HadoopFiles": "pipeline.extract._hadoop",
    "HadoopPath": "pipeline.extract._hadoop",
    "OpenedExtract": "pipeline.extract._dbread",
    "SourceTable": "pipeline.extract.schema",
    "as_extract": "pipeline.extract._dbsource",
    "database_source": "pipeline.extract._dbread",
    "discover_extract": "pipeline.extract._discover",
    "extract_location": "pipeline.extract._discover",
    "fhir_source": "pipeline.extract.readers.fhir",
    "is_database_uri": "pipeline.extract._dbsource",
    "is_hadoop_uri": "pipeline.extract._hadoop",
    "open_extract": "pipeline.extract._dbread",
    "source_column": "pipeline.extract.readers.mapped",
    "table_function": "pipeline.extract.readers.csv_parquet",
}

__all__ = [
    "DatabaseFacts",
    "ExtractPath",
    "ExtractTable",
    "HadoopFiles",
    "HadoopPath",
    "OpenedExtract",
    "SourceTable",
    "as_extract",
    "database_source",
    "discover_extract",
    "extract_location",
    "fhir_source",
    "is_database_uri",
    "is_hadoop_uri",
    "open_extract",
    "source_column",
    "table_function",
]


def __getattr__(name: str) -> Any:
    """Load a public name's module on first use (see the module docstring)."""
    if name not in _WHERE:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(import_module(_WHERE[name]), name)
    globals()[name] = value
    return value
