"""Site mapping files: where a site's tables are and how their columns map to ours.

No two sites deliver the same extract. A mapping file says, per canonical table, which file(s)
hold it, which source column feeds each canonical column (or a constant), how dates are
written, and how the site spells codes (sex codes, code-system labels, units). The engine reads
the files through it, so everything downstream sees the canonical schema.

```yaml
mapping: northside
tables:
  patients:
    file: people.csv
    columns: {patient_id: PersonID, birth_year: YearOfBirth, sex: Gender, death_date: Died}
    dates: "%d/%m/%Y"
    values: {sex: {"1": M, "2": F}}
```

A site whose extract lives in a database says where in a ``database:`` section, and each table
names a ``table:`` of that database's schema instead of a ``file:``. The password is never in
the mapping: it comes from the environment variable ``password_env`` names, or from libpq's own
``PGPASSWORD`` or password file (``PGPASSFILE``, ``~/.pgpass``).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Literal, Self

from pydantic import Field, field_validator, model_validator

from pipeline.config._base import Model, Name
from pipeline.config._document import did_you_mean, validate_document
from pipeline.config._yaml import load_yaml
from pipeline.errors import ConfigError
from pipeline.extract.schema import TABLES

if TYPE_CHECKING:  # pragma: no cover
    from pipeline.extract._hadoop import HadoopPath

_FORMAT = re.compile(r"%[dmyYbBHMSj]")


class Constant(Model):
    """A canonical column that holds the same value on every row (e.g. a practice id)."""

    value: str


class TableMapping(Model):
    """How one canonical table is read from a site's file(s) or database table.

    Attributes:
        file: A file, a glob of files, or a folder of Parquet parts, relative to the mapping.
        table: With a ``database:`` section, the table (or view) in its schema instead.
        columns: Canonical column -> the site's column name, or a constant.
        dates: ``iso`` (YYYY-MM-DD), ``excel`` (day serial numbers), or a strptime format
            such as ``%d/%m/%Y``; it applies to every date column of the table.
        values: Canonical column -> {the site's value: our value}; unlisted values pass as
            they are (so they can still be judged, e.g. as an unknown code system).
    """

    file: str | None = None
    table: Annotated[str, Field(min_length=1, max_length=63)] | None = None
    columns: dict[str, Annotated[str, Field(min_length=1)] | Constant] = Field(min_length=1)
    dates: str = "iso"
    values: dict[str, dict[str, str]] = Field(default_factory=dict)

    @field_validator("dates")
    @classmethod
    def _known_dates(cls, value: str) -> str:
        if value not in ("iso", "excel") and not _FORMAT.search(value):
            raise ValueError(
                f"dates must be iso, excel or a strptime format such as %d/%m/%Y, not '{value}'"
            )
        return value

    @model_validator(mode="after")
    def _one_place(self) -> Self:
        if (self.file is None) == (self.table is None):
            raise ValueError("give either file (a file source) or table (a database source)")
        return self


# An environment variable's name, as POSIX shells allow it.
EnvName = Annotated[str, Field(pattern=r"^[A-Za-z_][A-Za-z0-9_]*$", max_length=64)]


class DatabaseSettings(Model):
    """Where a database extract is and who reads it; never the password.

    Attributes:
        driver: The database system; ``postgresql`` is the one supported.
        host: Server name or address.
        port: Server port.
        database: The database holding the extract.
        schema_name: The schema (``schema:`` in the file) holding the extract's tables.
        user: The role the build logs in as (read access is enough).
        password_env: The environment variable holding the password; without it libpq's own
            ``PGPASSWORD`` or password file (``PGPASSFILE``, ``~/.pgpass``) is used.
        connect_timeout_seconds: How long to wait for the server before giving up.
    """

    driver: Literal["postgresql"]
    host: Annotated[str, Field(min_length=1)]
    port: Annotated[int, Field(ge=1, le=65535)] = 5432
    database: Annotated[str, Field(min_length=1, max_length=63)]
    schema_name: Annotated[str, Field(min_length=1, max_length=63, alias="schema")] = "public"
    user: Annotated[str, Field(min_length=1, max_length=63)]
    password_env: EnvName | None = None
    connect_timeout_seconds: Annotated[int, Field(ge=2, le=600)] = 10


class SiteMapping(Model):
    """A whole site mapping: a name, where its data is (files, or a database) and its tables."""

    mapping: Name
    database: DatabaseSettings | None = None
    tables: dict[str, TableMapping] = Field(min_length=1)

    @model_validator(mode="after")
    def _patients_present(self) -> Self:
        if "patients" not in self.tables:
            raise ValueError("a mapping must provide the patients table")
        return self


@dataclass(frozen=True)
class LoadedMapping:
    """A validated mapping with its file (paths in it are relative to that file's folder)."""

    file: Path | HadoopPath
    mapping: SiteMapping


def load_mapping(file: Path | HadoopPath) -> LoadedMapping:
    """Load and check a site mapping file, local or on a Hadoop file system.

    A file on a Hadoop file system (read through the Spark session, see
    :mod:`pipeline.extract._hadoop`) is taken as it is named: it has no local path to resolve.

    Raises:
        ConfigError: With file:line:col for unknown tables or columns and bad values.
    """
    if isinstance(file, Path):
        file = file.resolve()
    doc = load_yaml(file)
    mapping = validate_document(doc, SiteMapping)
    problems = []
    for table, spec in mapping.tables.items():
        if table not in TABLES:
            problems.append(
                doc.problem(
                    ("tables", table),
                    "unknown-table",
                    f"'{table}' is not a canonical table{did_you_mean(table, TABLES)}",
                )
            )
            continue
        if (mapping.database is None) != (spec.table is None):
            where, why = (
                ("table", "a mapping without a database: section reads files; give file")
                if spec.table is not None
                else ("file", "a mapping with a database: section reads tables; give table")
            )
            problems.append(doc.problem(("tables", table, where), "wrong-source", why))
        known = TABLES[table].column_names
        for group in ("columns", "values"):
            for column in getattr(spec, group):
                if column not in known:
                    problems.append(
                        doc.problem(
                            ("tables", table, group, column),
                            "unknown-column",
                            f"'{column}' is not a column of {table}{did_you_mean(column, known)}",
                        )
                    )
    if problems:
        raise ConfigError(problems)
    return LoadedMapping(file, mapping)
