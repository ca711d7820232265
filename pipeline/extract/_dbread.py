"""Reading a database extract: one snapshot, streamed to local Parquet, with checksums.

A build reads each source table two or three times (different stages), so rows cannot be
streamed straight into the stages. Instead every table the plan reads is streamed once from
the server, in Arrow record batches, into a Parquet file in a temporary folder, reading only
the columns the plan needs; the engine then binds those files exactly as it binds a Parquet
extract (the mapping's renames, constants, dates and value translations apply unchanged).
Memory stays bounded by one record batch at a time, whatever the table's size; the temporary
copy is deleted when the run ends.

All tables are read in one ``REPEATABLE READ`` read-only transaction, so they come from one
snapshot of the database even while others write to it. In the same snapshot the server
computes each table's row count and a content checksum: the sum, modulo 2^64, of the first 64
bits of the MD5 of each whole row's text, an aggregate that does not depend on row order (a
sum, not XOR, so two identical rows do not cancel out). ``verify`` compares them.
"""

from __future__ import annotations

import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pyarrow.parquet as pq
import sqlglot
from sqlglot import exp

from pipeline.config._mapping import load_mapping
from pipeline.errors import ExtractError
from pipeline.extract._dbsource import (
    DatabaseSource,
    DatabaseTable,
    connect,
    discover_database,
    fetch,
    is_database_uri,
    mapping_source,
    parse_uri,
    read_expression,
    scrub,
)
from pipeline.extract._discover import discover_extract
from pipeline.extract._hadoop import HadoopFiles, HadoopPath, is_hadoop_uri, safe_uri
from pipeline.extract._table import ExtractPath, ExtractTable
from pipeline.extract.schema import SourceTable

# Fixed text forms, so a row's text (and so the checksum) does not depend on client settings.
_SESSION = (
    "SET DateStyle TO 'ISO, YMD'",
    "SET IntervalStyle TO 'postgres'",
    "SET extra_float_digits TO 1",
    "SET bytea_output TO 'hex'",
)
_BEGIN = "BEGIN ISOLATION LEVEL REPEATABLE READ READ ONLY"
_ROW_HASH = (
    "SELECT COUNT(*), COALESCE(SUM(CAST(CAST(CAST('x' || LEFT(MD5(CAST(t AS TEXT)), 16) "
    "AS BIT(64)) AS BIGINT) AS NUMERIC)), 0) FROM placeholder AS t"
)
_TWO_64 = 1 << 64


@dataclass(frozen=True)
class TableFacts:
    """One table as read: canonical name, where it was, rows and content checksum."""

    table: str
    source: str
    rows: int
    checksum: str


@dataclass(frozen=True)
class DatabaseFacts:
    """What the manifest records of a database source (no password, no machine path)."""

    uri: str
    server_version: str
    driver: str
    tables: tuple[TableFacts, ...]

    def as_manifest(self) -> dict[str, Any]:
        """The manifest's ``database`` section."""
        return {
            "driver": self.driver,
            "server_version": self.server_version,
            "tables": [
                {"table": t.table, "source": t.source, "rows": t.rows, "checksum": t.checksum}
                for t in sorted(self.tables, key=lambda t: t.table)
            ],
        }


@dataclass(frozen=True)
class OpenedExtract:
    """The tables a run binds, and for a database source what was read from it."""

    tables: dict[str, ExtractTable]
    database: DatabaseFacts | None = None
    mapping: HadoopPath | None = None
    """A site mapping file on a Hadoop file system (a local one is the extract argument)."""

    @property
    def files(self) -> tuple[ExtractPath, ...]:
        """The extract's own files (none for a database: its temporary copy is not input).

        A mapping file on a Hadoop file system is among them: it cannot be reached from the
        extract argument's text alone, so the manifest hashes it from here.
        """
        if self.database is not None:
            return ()
        mapping = (self.mapping,) if self.mapping is not None else ()
        return (*(f for t in self.tables.values() for f in t.files), *mapping)


def database_source(extract: Path | str) -> DatabaseSource | None:
    """The database an extract argument names (a URI, or a mapping with ``database:``)."""
    if isinstance(extract, str):
        return parse_uri(extract) if is_database_uri(extract) else None
    if extract.is_file() and extract.suffix in (".yaml", ".yml"):
        return mapping_source(load_mapping(extract))
    return None


def _driver_version() -> str:
    from importlib.metadata import version

    return f"adbc-driver-postgresql {version('adbc-driver-postgresql')}"


def _checksum(cursor: Any, name: str, table: DatabaseTable) -> TableFacts:
    query = sqlglot.parse_one(_ROW_HASH, dialect="postgres")
    target = table.relation().as_("t")
    query = query.transform(
        lambda n: target.copy() if isinstance(n, exp.Table) and n.name == "placeholder" else n
    )
    rows, total = fetch(cursor, query.sql("postgres"))[0]
    return TableFacts(name, table.qualified, int(rows), f"{int(total) % _TWO_64:016x}")


def _stage(
    cursor: Any, name: str, table: DatabaseTable, folder: Path
) -> tuple[Path, tuple[str, ...]]:
    """Stream the plan's columns of one table into a Parquet file, one batch at a time."""
    columns = [read_expression(table, lower, canonical) for canonical, lower in table.read]
    if not columns:  # only constants are mapped: the rows still count
        columns = [exp.null().as_("ascertain_no_column")]
    select = exp.select(*columns).from_(table.relation())
    cursor.execute(select.sql("postgres"))
    reader = cursor.fetch_record_batch()
    path = folder / f"{name}.parquet"
    schema = reader.schema.remove_metadata()
    with pq.ParquetWriter(path, schema) as writer:
        for batch in reader:
            writer.write_batch(batch.replace_schema_metadata(None))
    return path, tuple(schema.names)


def read_database(
    source: DatabaseSource,
    sources: tuple[SourceTable, ...],
    folder: Path,
    *,
    optional: frozenset[str] = frozenset(),
) -> OpenedExtract:
    """Read every table the plan needs from one snapshot into Parquet files in ``folder``.

    Raises:
        ExtractError: The server cannot be reached, refuses the login, or fails a read (the
            message names the table; never the password).
        ConfigError: A mapped table or column is missing or of a type that cannot be read.
    """
    secret = source.password()
    con = connect(source)
    current = "the catalog"
    try:
        cursor = con.cursor()
        for setting in _SESSION:
            cursor.execute(setting)
        cursor.execute(_BEGIN)
        found = discover_database(source, sources, cursor, optional)
        version = str(fetch(cursor, "SELECT current_setting('server_version')")[0][0])
        tables: dict[str, ExtractTable] = {}
        facts = []
        for table in sources:
            if table.name not in found:
                continue
            here = found[table.name]
            current = f"table {here.qualified} (for {table.name})"
            path, names = _stage(cursor, table.name, here, folder)
            spec = source.table_spec(table.name)
            tables[table.name] = ExtractTable(table.name, (path,), "parquet", names, mapping=spec)
            facts.append(_checksum(cursor, table.name, here))
        cursor.execute("COMMIT")
    except Exception as err:
        if type(err).__module__.startswith("adbc_driver"):
            raise ExtractError(
                f"reading {current} failed: {scrub(str(err), secret)}",
                code="read-failed",
                where=source.label,
            ) from None
        raise
    finally:
        con.close()
    return OpenedExtract(
        tables, DatabaseFacts(source.uri, version, _driver_version(), tuple(facts))
    )


@contextmanager
def open_extract(
    extract: Path | str,
    sources: tuple[SourceTable, ...],
    *,
    optional: frozenset[str] = frozenset(),
    hadoop: HadoopFiles | None = None,
) -> Iterator[OpenedExtract]:
    """The extract's tables for a run: files as they are, or a database read into a snapshot.

    ``optional`` names tables that may be absent from a database (``profile``); a missing one
    is left out of the result instead of being an error. An extract on a Hadoop file system
    (``hdfs://...``, see :func:`is_hadoop_uri`; a folder or a site mapping file) is
    discovered through ``hadoop``, the file systems of the Spark session that will read it.

    Raises:
        ExtractError: A Hadoop URI without a Spark session, or a scheme Spark has no file
            system for.
        AscertainError: As :func:`discover_extract` or :func:`read_database`.
    """
    if isinstance(extract, str) and is_hadoop_uri(extract):
        if hadoop is None:
            scheme = extract.split(":", 1)[0]
            raise ExtractError(
                f"an extract on {scheme}:// is listed and read through Spark's Hadoop file "
                "systems, so it needs --engine spark (a build or verify); other commands read "
                "a local folder",
                code="needs-spark",
                where=safe_uri(extract),
            )
        found = hadoop.extract(extract)
        mapping = found if found.is_file() else None
        yield OpenedExtract(discover_extract(found, sources), mapping=mapping)
        return
    database = database_source(extract)
    if database is None:
        if isinstance(extract, str):
            extract = Path(extract)
        yield OpenedExtract(discover_extract(extract, sources))
        return
    with tempfile.TemporaryDirectory(prefix="ascertain-database-") as folder:
        yield read_database(database, sources, Path(folder), optional=optional)
