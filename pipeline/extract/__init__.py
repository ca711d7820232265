"""The canonical extract: locating its tables and checking their columns."""

from pipeline.extract._discover import ExtractTable, discover_extract

__all__ = ["ExtractTable", "discover_extract"]
