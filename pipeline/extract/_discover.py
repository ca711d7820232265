"""Find the canonical tables of an extract and check their columns before any work.

An extract is a folder of canonical CSV or Parquet files, a FHIR R4 bulk-data export (a
folder of ``*.ndjson`` files) or a site mapping file; each kind has its reader in
:mod:`pipeline.extract.readers`. Only file names and headers are read here; the rows are read
by the engine.
"""

from __future__ import annotations

import re
from pathlib import Path
from urllib.parse import urlparse
from urllib.request import url2pathname

from pipeline.errors import ExtractError
from pipeline.extract._table import ExtractPath, ExtractTable
from pipeline.extract.readers.csv_parquet import candidates, discover_tabular
from pipeline.extract.readers.fhir import discover_fhir, ndjson_files
from pipeline.extract.readers.mapped import discover_mapped
from pipeline.extract.schema import SourceTable

_SCHEME = re.compile(r"^([A-Za-z][A-Za-z0-9+.-]*)://")


def extract_location(text: str) -> Path | str:
    """An extract given as a path or a URI: a local path, or a URI for Spark's file systems.

    ``file://`` URIs are local paths. Other schemes (``hdfs://``, ``s3a://``) stay text: such
    an extract is listed, read and hashed through the Hadoop file systems of the Spark session
    (see :mod:`pipeline.extract._hadoop`), so it needs ``--engine spark``.

    Raises:
        ExtractError: A ``file://`` URI of another host.
    """
    found = _SCHEME.match(text)
    if not found:
        return Path(text)
    parsed = urlparse(text)
    if parsed.scheme.lower() != "file":
        return text
    if parsed.netloc not in ("", "localhost"):
        raise ExtractError(
            f"a file:// URI names a path on this machine, not on host '{parsed.netloc}' "
            "(write file:///path)",
            code="remote-file-uri",
            where=text,
        )
    return Path(url2pathname(parsed.path))


def discover_folder(
    folder: ExtractPath, tables: tuple[SourceTable, ...]
) -> dict[str, ExtractTable]:
    """Locate each table the plan reads and check it has the columns the plan needs.

    A folder holding ``*.ndjson`` files is read as a FHIR R4 bulk-data export instead. The
    folder may be a local one or on a Hadoop file system (:class:`HadoopPath`): discovery
    uses only the methods both offer.

    Raises:
        ExtractError: The folder or a table is missing, ambiguous, unreadable, or lacks a
            required column. The error's ``where`` names the folder or the file, its ``code``
            what is wrong (``missing-table``, ``missing-column``, ``unreadable-file``...).
    """
    if not folder.is_dir():
        raise ExtractError(
            "the extract folder does not exist", code="missing-folder", where=str(folder)
        )
    ndjson = ndjson_files(folder)
    if not ndjson:
        return discover_tabular(folder, tables)
    tabular = [files[0] for t in tables for files, _ in candidates(folder, t.name)]
    if tabular:
        raise ExtractError(
            f"holds both FHIR NDJSON files and canonical tables ({tabular[0]}); "
            "keep one kind of extract per folder",
            code="mixed-extract",
            where=str(folder),
        )
    return discover_fhir(folder, ndjson, tables)


def discover_extract(
    source: ExtractPath, tables: tuple[SourceTable, ...]
) -> dict[str, ExtractTable]:
    """Locate each table the plan reads, in an extract folder or through a mapping file.

    A folder holds canonical CSV or Parquet files, or a FHIR R4 bulk export (``*.ndjson``);
    a ``.yaml`` file is a site mapping (see :mod:`pipeline.config._mapping`). Either may be
    local or on a Hadoop file system (:class:`HadoopPath`).

    Raises:
        ExtractError: A table is missing, ambiguous, unreadable or lacks a required column.
        ConfigError: The mapping file is invalid or names a missing file or column.
    """
    if source.is_file() and source.suffix in (".yaml", ".yml"):
        return discover_mapped(source, tables)
    return discover_folder(source, tables)
