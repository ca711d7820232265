"""Extracts that live in a PostgreSQL database: where they are, logging in, checking tables.

A database source is a site mapping file with a ``database:`` section (any shape, mapped as
for files) or a plain connection URI (``postgresql://user@host:port/database?schema=s``) for a
database already in canonical shape. The password never passes through the mapping, the study,
the command line, the outputs or the logs: it comes from the environment variable the mapping
names (``password_env``), or from libpq itself (``PGPASSWORD``, or its password file
``PGPASSFILE`` / ``~/.pgpass``). It is handed to the driver only, and scrubbed from any error.

The driver is ADBC's PostgreSQL driver from PyPI (``pip install "ascertain[postgres]"``), which
bundles libpq and returns Arrow record batches. Discovery reads only the catalog: the schema,
each table, its columns and their types, and the read privilege; no rows.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import parse_qsl, quote, unquote, urlsplit

import sqlglot
from sqlglot import exp

from pipeline.config._mapping import Constant, LoadedMapping, TableMapping
from pipeline.config._yaml import load_yaml
from pipeline.errors import ConfigError, ExtractError, Problem
from pipeline.extract.schema import DATE_COLUMNS, SourceTable

_URI = re.compile(r"^postgres(?:ql)?://", re.IGNORECASE)
_URI_OPTIONS = ("schema", "connect_timeout")
DEFAULT_TIMEOUT = 10

# PostgreSQL types (pg_type.typname) read as they are, and those read as text or as a date
# (timestamps in date columns: the date the server's time zone gives). Any other type
# (boolean, bytea, json, arrays, intervals, geometry...) cannot hold an extract's values.
_NATIVE = frozenset(
    {"text", "varchar", "bpchar", "name", "int2", "int4", "int8", "float4", "float8", "date"}
)
_AS_TEXT = frozenset({"numeric", "uuid", "citext", "timestamp", "timestamptz"})
_TIMESTAMPS = frozenset({"timestamp", "timestamptz"})


def is_database_uri(text: str) -> bool:
    """Whether an ``--extract`` or ``extract:`` value is a connection URI, not a path."""
    return bool(_URI.match(text))


def as_extract(text: str) -> Path | str:
    """An extract argument as given: a database URI stays text, anything else is a local path.

    Raises:
        ExtractError: A URI of a file system this process cannot read (see
            :func:`pipeline.extract._discover.extract_location`).
    """
    # Imported here: discovery imports this module's neighbours, not the other way round.
    from pipeline.extract._discover import extract_location

    return text if is_database_uri(text) else extract_location(text)


@dataclass(frozen=True)
class DatabaseSource:
    """Where a database extract is and who reads it (never the password).

    Attributes:
        host, port, database, schema, user: Where to connect, and as whom.
        password_env: The environment variable holding the password, or None for libpq's own.
        timeout: Seconds to wait for the server.
        mapping: The site mapping file it came from, or None for a plain URI.
    """

    host: str
    port: int
    database: str
    schema: str
    user: str
    password_env: str | None
    timeout: int
    mapping: LoadedMapping | None = None

    @property
    def uri(self) -> str:
        """The source as a URI without password (safe to print and to record)."""
        user, database = quote(self.user, safe=""), quote(self.database, safe="")
        return f"postgresql://{user}@{self.host}:{self.port}/{database}?schema={self.schema}"

    @property
    def label(self) -> str:
        """How messages name the source: the mapping file, or the URI."""
        return str(self.mapping.file) if self.mapping else self.uri

    def table_spec(self, name: str) -> TableMapping | None:
        """The mapping of canonical table ``name`` (None for a source in canonical shape)."""
        return self.mapping.mapping.tables.get(name) if self.mapping else None

    def password(self) -> str | None:
        """The password from ``password_env``, or None to let libpq find it.

        Raises:
            ExtractError: ``password_env`` names a variable that is not set.
        """
        if self.password_env is None:
            return None
        value = os.environ.get(self.password_env)
        if value is None:
            raise ExtractError(
                f"the environment variable {self.password_env} (password_env) is not set; set "
                "it to the database password before running",
                code="password-not-set",
                where=self.label,
            )
        return value


def parse_uri(text: str) -> DatabaseSource:
    """A plain connection URI as a source (canonical shape, password from libpq).

    Raises:
        ExtractError: The URI holds a password, or is incomplete or has unknown options. The
            URI itself is never repeated in the message (it may hold the password).
    """
    parts = urlsplit(text)
    if parts.password is not None:
        raise ExtractError(
            "the connection URI holds a password; remove it and set PGPASSWORD or use a "
            "password file (PGPASSFILE or ~/.pgpass) instead, so it never reaches logs or outputs",
            code="password-in-uri",
        )
    options = dict(parse_qsl(parts.query, keep_blank_values=True))
    unknown = sorted(set(options) - set(_URI_OPTIONS))
    database = unquote(parts.path.lstrip("/"))
    if unknown or not parts.hostname or not parts.username or not database:
        what = f"unknown option(s) {', '.join(unknown)}" if unknown else "it lacks a part"
        raise ExtractError(
            f"the connection URI cannot be used ({what}); write "
            "postgresql://USER@HOST:PORT/DATABASE?schema=SCHEMA&connect_timeout=SECONDS",
            code="bad-uri",
        )
    try:
        port = parts.port or 5432
        timeout = int(options.get("connect_timeout", DEFAULT_TIMEOUT))
    except ValueError as err:
        raise ExtractError(
            f"the connection URI has a bad port or connect_timeout: {err}", code="bad-uri"
        ) from err
    return DatabaseSource(
        parts.hostname,
        port,
        database,
        options.get("schema", "public"),
        unquote(parts.username),
        None,
        max(2, timeout),
    )


def mapping_source(loaded: LoadedMapping) -> DatabaseSource | None:
    """The database a mapping file reads, or None when it reads files."""
    settings = loaded.mapping.database
    if settings is None:
        return None
    return DatabaseSource(
        settings.host,
        settings.port,
        settings.database,
        settings.schema_name,
        settings.user,
        settings.password_env,
        settings.connect_timeout_seconds,
        loaded,
    )


def scrub(message: str, secret: str | None) -> str:
    """A driver's message with the password removed, wherever it appears."""
    if secret:
        for form in {secret, quote(secret, safe="")}:
            message = message.replace(form, "***")
    return message.strip()


def connect(source: DatabaseSource) -> Any:
    """An autocommit ADBC connection to the source.

    Raises:
        ExtractError: The driver is not installed, or the server cannot be reached or refuses
            the login (the message names the server and the user, never the password).
    """
    try:
        import adbc_driver_postgresql.dbapi as driver
    except ImportError as err:
        raise ExtractError(
            "reading a database needs its driver: "
            "pip install 'ascertain[postgres]' (adbc-driver-postgresql)",
            code="driver-missing",
            where=source.label,
        ) from err
    secret = source.password()
    login = quote(source.user, safe="") + (f":{quote(secret, safe='')}" if secret else "")
    uri = (
        f"postgresql://{login}@{quote(source.host, safe='[]:')}:{source.port}/"
        f"{quote(source.database, safe='')}?connect_timeout={source.timeout}"
        "&application_name=ascertain"
    )
    try:
        return driver.connect(uri, autocommit=True)
    except driver.Error as err:
        raise ExtractError(
            f"cannot connect to {source.host}:{source.port} as {source.user} "
            f"(database {source.database}, waited at most {source.timeout} s): "
            f"{scrub(str(err), secret)}",
            code="connection-failed",
            where=source.label,
        ) from None


def pg_query(text: str, **values: str) -> str:
    """A constant PostgreSQL template with ``:name`` placeholders filled by string literals."""
    tree = sqlglot.parse_one(text, dialect="postgres")
    filled = tree.transform(
        lambda n: exp.Literal.string(values[n.name]) if isinstance(n, exp.Placeholder) else n
    )
    return filled.sql("postgres")


def fetch(cursor: Any, sql: str) -> list[tuple[Any, ...]]:
    """Run one query and return all its rows."""
    cursor.execute(sql)
    return list(cursor.fetchall())


_SCHEMA = "SELECT COUNT(*) FROM pg_namespace WHERE nspname = :schema"
_TABLE = """
SELECT c.oid, HAS_TABLE_PRIVILEGE(c.oid, 'SELECT') FROM pg_class AS c
JOIN pg_namespace AS n ON n.oid = c.relnamespace
WHERE n.nspname = :schema AND c.relname = :relation AND c.relkind IN ('r', 'v', 'm', 'p', 'f')
"""
_COLUMNS = """
SELECT a.attname, t.typname, t.typtype FROM pg_attribute AS a
JOIN pg_type AS t ON t.oid = a.atttypid
WHERE a.attrelid = CAST(:oid AS OID) AND a.attnum > 0 AND NOT a.attisdropped ORDER BY a.attnum
"""


@dataclass(frozen=True)
class DatabaseTable:
    """A table of the database and its columns: (lower-cased name, name, type) in order.

    ``read`` holds the columns the plan reads: (canonical column, lower-cased name).
    """

    schema: str
    table: str
    columns: tuple[tuple[str, str, str], ...]
    read: tuple[tuple[str, str], ...] = ()

    def relation(self) -> exp.Table:
        """The table as a quoted, schema-qualified SQL relation."""
        return exp.Table(
            this=exp.to_identifier(self.table, quoted=True),
            db=exp.to_identifier(self.schema, quoted=True),
        )

    @property
    def qualified(self) -> str:
        """``schema.table``, for messages and the manifest."""
        return f"{self.schema}.{self.table}"


def read_expression(table: DatabaseTable, lower: str, canonical: str) -> exp.Expression:
    """How one column is selected: as it is, or cast to text or a date on the server."""
    name, kind = next((n, k) for low, n, k in table.columns if low == lower)
    column: exp.Expression = exp.column(exp.to_identifier(name, quoted=True))
    if kind in _AS_TEXT:
        to = "DATE" if canonical in DATE_COLUMNS and kind in _TIMESTAMPS else "TEXT"
        column = exp.cast(column, to)
    return column.as_(exp.to_identifier(lower, quoted=True))


class _Problems:
    """Problems found in discovery: located in the mapping file, or plain sentences for a URI."""

    def __init__(self, source: DatabaseSource) -> None:
        self.source = source
        self.doc = load_yaml(source.mapping.file) if source.mapping else None
        self.located: list[Problem] = []
        self.plain: list[tuple[str, str]] = []

    def add(self, path: tuple[str, ...], code: str, message: str) -> None:
        if self.doc is not None:
            self.located.append(self.doc.problem(path, code, message, at_value=True))
        else:
            self.plain.append((code, message))

    def raise_any(self) -> None:
        if self.located:
            raise ConfigError(self.located)
        if self.plain:
            codes = sorted({code for code, _ in self.plain})
            raise ExtractError(
                "; ".join(message for _, message in self.plain),
                code=codes[0] if len(codes) == 1 else "database-mismatch",
                where=self.source.label,
            )


def _type_problems(found: DatabaseTable, problems: _Problems, name: str) -> None:
    types = {low: (n, kind) for low, n, kind in found.columns}
    for canonical, lower in found.read:
        column, kind = types[lower]
        if kind not in _NATIVE and kind not in _AS_TEXT:
            problems.add(
                ("tables", name, "columns", canonical),
                "bad-column-type",
                f"column {found.qualified}.{column} is of type {kind}, which cannot hold the "
                f"values of {name}.{canonical} (use text, a number, a date or a timestamp)",
            )


def discover_database(
    source: DatabaseSource,
    tables: tuple[SourceTable, ...],
    cursor: Any,
    optional: frozenset[str] = frozenset(),
) -> dict[str, DatabaseTable]:
    """Check the schema, each table the plan reads, its columns, their types and read access.

    Returns each canonical table's database table. Columns are matched case-insensitively.
    A table named in ``optional`` that is not there (or not mapped) is left out silently.

    Raises:
        ConfigError: Through a mapping file, located at the mapping's line.
        ExtractError: For a plain URI, naming the table or column.
    """
    # Imported here: the CSV reader's module imports this one's neighbours (through _hadoop).
    from pipeline.extract.readers.csv_parquet import check_columns

    problems = _Problems(source)
    if fetch(cursor, pg_query(_SCHEMA, schema=source.schema))[0][0] == 0:
        raise ExtractError(
            f"schema {source.schema} is not in database {source.database}",
            code="missing-schema",
            where=source.label,
        )
    found: dict[str, DatabaseTable] = {}
    for table in tables:
        spec = source.table_spec(table.name)
        if source.mapping and spec is None:
            if table.name in optional:
                continue
            problems.add(("tables",), "missing-table", f"no mapping for table '{table.name}'")
            continue
        relation = spec.table if spec and spec.table else table.name
        rows = fetch(cursor, pg_query(_TABLE, schema=source.schema, relation=relation))
        if not rows:
            if table.name in optional:
                continue
            problems.add(
                ("tables", table.name, "table"),
                "missing-table",
                f"table {source.schema}.{relation} (for {table.name}) is not in the database",
            )
            continue
        oid, allowed = rows[0]
        if not allowed:
            problems.add(
                ("tables", table.name, "table"),
                "no-permission",
                f"{source.user} may not read table {source.schema}.{relation} (for "
                f"{table.name}); ask for SELECT on it",
            )
            continue
        columns = tuple(
            (str(n).lower(), str(n), "text" if typtype == "e" else str(kind))
            for n, kind, typtype in fetch(cursor, pg_query(_COLUMNS, oid=str(oid)))
        )
        names = tuple(low for low, _, _ in columns)
        wanted = _wanted(table, spec, names, f"{source.schema}.{relation}", problems)
        here = DatabaseTable(source.schema, relation, columns, tuple(wanted.items()))
        try:
            check_columns(table, Path(here.qualified), tuple(spec.columns) if spec else names)
        except ExtractError as err:
            problems.add(("tables", table.name, "columns"), "missing-column", err.message)
            continue
        _type_problems(here, problems, table.name)
        found[table.name] = here
    problems.raise_any()
    return found


def _wanted(
    table: SourceTable,
    spec: TableMapping | None,
    names: tuple[str, ...],
    qualified: str,
    problems: _Problems,
) -> dict[str, str]:
    """The database columns the plan reads from this table: canonical column -> lower name.

    Every column a mapping names must exist, as for files, even one this plan does not read.
    """
    if spec is None:
        return {c: c for c in table.columns if c in names}
    wanted: dict[str, str] = {}
    for canonical, mapped in spec.columns.items():
        if isinstance(mapped, Constant):
            continue
        lower = mapped.strip().lower()
        if lower not in names:
            problems.add(
                ("tables", table.name, "columns", canonical),
                "missing-column",
                f"column '{mapped}' is not in table {qualified} "
                f"(found: {', '.join(names) or 'no columns'})",
            )
        elif canonical in table.columns:
            wanted[canonical] = lower
    return wanted
