"""Readers: each turns one kind of delivered extract into the canonical tables.

- :mod:`~pipeline.extract.readers.csv_parquet`: canonical CSV and Parquet files (headers
  checked here; the rows read by the engine, through :func:`~.csv_parquet.table_function` on
  DuckDB and Spark's own readers on Spark).
- :mod:`~pipeline.extract.readers.fhir`: a FHIR R4 bulk-data export (NDJSON), as a SELECT
  over its files giving the canonical columns.
- :mod:`~pipeline.extract.readers.mapped`: a site's own files through a mapping file, as one
  column expression per canonical column.

Each gives the engines what they bind as ``src_<table>``: an :class:`ExtractTable` and, where
the rows need more than a plain file read, a sqlglot expression. Where the extract lives
(a folder, a Hadoop file system, a database copied into Parquet) is decided in the package
root (``_discover``, ``_hadoop``, ``_dbsource``, ``_dbread``), not here.
"""
