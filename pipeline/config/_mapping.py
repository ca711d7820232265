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
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Self

from pydantic import Field, field_validator, model_validator

from pipeline.config._base import Model, Name
from pipeline.config._loader import did_you_mean, validate_document
from pipeline.config._yaml import load_yaml
from pipeline.errors import ConfigError

# Canonical columns per table, with the ones that hold dates: the canonical schema itself.
CANONICAL_COLUMNS: dict[str, tuple[str, ...]] = {
    "patients": (
        "patient_id", "birth_date", "birth_year", "sex", "death_date", "practice_id",
        "registration_date", "deregistration_date",
    ),
    "encounters": ("patient_id", "encounter_date", "encounter_type"),
    "diagnoses": ("patient_id", "event_date", "code_system", "code", "source"),
    "prescriptions": ("patient_id", "start_date", "stop_date", "atc", "drug_text"),
    "measurements": ("patient_id", "obs_date", "measure", "value_text", "value", "unit"),
}  # fmt: skip
DATE_COLUMNS = frozenset(
    {
        "birth_date", "death_date", "registration_date", "deregistration_date",
        "encounter_date", "event_date", "start_date", "stop_date", "obs_date",
    }
)  # fmt: skip

_FORMAT = re.compile(r"%[dmyYbBHMSj]")


class Constant(Model):
    """A canonical column that holds the same value on every row (e.g. a practice id)."""

    value: str


class TableMapping(Model):
    """How one canonical table is read from a site's file(s).

    Attributes:
        file: A file, a glob of files, or a folder of Parquet parts, relative to the mapping.
        columns: Canonical column -> the site's column name, or a constant.
        dates: ``iso`` (YYYY-MM-DD), ``excel`` (day serial numbers), or a strptime format
            such as ``%d/%m/%Y``; it applies to every date column of the table.
        values: Canonical column -> {the site's value: our value}; unlisted values pass as
            they are (so they can still be judged, e.g. as an unknown code system).
    """

    file: str
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


class SiteMapping(Model):
    """A whole site mapping: a name and the tables it provides."""

    mapping: Name
    tables: dict[str, TableMapping] = Field(min_length=1)

    @model_validator(mode="after")
    def _patients_present(self) -> Self:
        if "patients" not in self.tables:
            raise ValueError("a mapping must provide the patients table")
        return self


@dataclass(frozen=True)
class LoadedMapping:
    """A validated mapping with its file (paths in it are relative to that file's folder)."""

    file: Path
    mapping: SiteMapping


def load_mapping(file: Path) -> LoadedMapping:
    """Load and check a site mapping file.

    Raises:
        ConfigError: With file:line:col for unknown tables or columns and bad values.
    """
    file = file.resolve()
    doc = load_yaml(file)
    mapping = validate_document(doc, SiteMapping)
    problems = []
    for table, spec in mapping.tables.items():
        if table not in CANONICAL_COLUMNS:
            problems.append(
                doc.problem(
                    ("tables", table),
                    "unknown-table",
                    f"'{table}' is not a canonical table{did_you_mean(table, CANONICAL_COLUMNS)}",
                )
            )
            continue
        known = CANONICAL_COLUMNS[table]
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
