"""The canonical extract: its five tables, their columns, types and which of them are needed.

This is the one definition of the shape every reader delivers and every stage reads. The site
mapping checks its files against it (:mod:`pipeline.config._mapping`), the compiler takes the
tables a study reads from it (:data:`SourceTable` values, ``compile/_sources.py``), the quality
log and the profile date rows by it, and the FHIR reader derives its columns from it. Nothing
here reads a file; the module imports nothing of the package, so any layer may read it.

Each column has a role: ``required`` (the table is refused without it), ``alternative`` (one
of a group is enough: a birth date or a birth year), ``optional`` (read when present, NULL
otherwise) or ``unread`` (part of the canonical table, carried by readers and writers for
people, never read by a study: a prescription's ``drug_text``).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

ColumnType = Literal["id", "text", "date", "year", "number"]
Role = Literal["required", "alternative", "optional", "unread"]

# Every source relation also carries ``source_position``: where a row sits in its table's
# files, as file index * POSITION_BASE + row number (CSV: 1 = the first record after the
# header; FHIR NDJSON: the line number). Parquet rows have none (NULL). The quality log names
# the first row set aside per reason with it.
SOURCE_POSITION = "source_position"
POSITION_BASE = 10**12
# Every source relation also carries ``source_problem``: the reason the reader itself set a row
# aside before any stage judged it (a FHIR line that is not JSON, a resource of another type, a
# refuted diagnosis...), NULL for a row the reader has nothing against (every CSV and Parquet
# row). The quality log gives it first; no stage uses such a row.
SOURCE_PROBLEM = "source_problem"


@dataclass(frozen=True)
class SourceTable:
    """An extract table the plan reads, with the columns it needs.

    Attributes:
        name: Canonical table name, e.g. ``diagnoses``; the plan reads it as ``src_<name>``.
        required: Columns that must be present in the file.
        optional: Columns read when present and taken as NULL otherwise.
        one_of: Groups of columns of which at least one must be present.
        code_systems: For ``diagnoses``: the code systems the study's definitions read
            (``ICD10``, ``SNOMED``...). A reader of records coded in several systems at once
            (a FHIR Condition) gives a row per coding in these systems; empty: the reader's
            default. CSV and Parquet readers ignore it.
        measure_codes: For ``measurements``: (LOINC code, measure) pairs of every measure file
            the study may read (shipped and its own), so a reader of LOINC-coded observations
            (FHIR) names them as the study's measures; empty: the reader's own table.
    """

    name: str
    required: tuple[str, ...]
    optional: tuple[str, ...] = ()
    one_of: tuple[tuple[str, ...], ...] = ()
    code_systems: tuple[str, ...] = ()
    measure_codes: tuple[tuple[str, str], ...] = ()

    @property
    def relation(self) -> str:
        """The relation name stages use to read this table."""
        return f"src_{self.name}"

    @property
    def columns(self) -> tuple[str, ...]:
        """Every column the plan may read, in a fixed order."""
        grouped = tuple(c for group in self.one_of for c in group)
        return self.required + grouped + self.optional


@dataclass(frozen=True)
class Column:
    """One canonical column.

    Attributes:
        name: Its canonical name (lower case).
        type: What its values mean once read: ``id`` (a patient or practice identifier),
            ``text``, ``date`` (ISO ``YYYY-MM-DD`` in a canonical file), ``year`` or ``number``.
            Files may hold every value as text; stages cast them.
        role: ``required``, ``alternative`` (see :attr:`CanonicalTable.one_of`), ``optional``
            or ``unread`` (see the module's docstring).
    """

    name: str
    type: ColumnType
    role: Role


@dataclass(frozen=True)
class CanonicalTable:
    """One canonical table: its columns in canonical order and what dates its rows.

    Attributes:
        name: The table's name (and file stem in a canonical folder).
        columns: Its columns, in canonical order.
        one_of: Groups of ``alternative`` columns, each in the order the plan reads them; one
            column of each group must be present.
        row_date: The date that places a row in time (a patient's birth): what the profile's
            date ranges and the quality log's date checks read.
        key: The columns a row belongs to (every table is keyed by its patient).
    """

    name: str
    columns: tuple[Column, ...]
    row_date: str
    one_of: tuple[tuple[str, ...], ...] = ()
    key: tuple[str, ...] = ("patient_id",)

    def __post_init__(self) -> None:
        names = self.column_names
        grouped = [c for group in self.one_of for c in group]
        alternatives = [c.name for c in self.columns if c.role == "alternative"]
        if len(set(names)) != len(names) or sorted(grouped) != sorted(alternatives):
            raise ValueError(f"{self.name}: columns repeated, or one_of differs from alternatives")
        if self.row_date not in self.dates or not set(self.key) <= set(names):
            raise ValueError(f"{self.name}: row_date or key is not a column of the table")

    @property
    def column_names(self) -> tuple[str, ...]:
        """Every canonical column of the table, in canonical order."""
        return tuple(c.name for c in self.columns)

    @property
    def dates(self) -> tuple[str, ...]:
        """The columns holding dates, in canonical order."""
        return tuple(c.name for c in self.columns if c.type == "date")

    def _role(self, role: Role) -> tuple[str, ...]:
        return tuple(c.name for c in self.columns if c.role == role)

    @property
    def source(self) -> SourceTable:
        """The table as a plan reads it: every column but the ``unread`` ones."""
        return SourceTable(
            self.name,
            required=self._role("required"),
            optional=self._role("optional"),
            one_of=self.one_of,
        )


def _table(
    name: str,
    row_date: str,
    *columns: tuple[str, ColumnType, Role],
    one_of: tuple[tuple[str, ...], ...] = (),
) -> CanonicalTable:
    return CanonicalTable(name, tuple(Column(*c) for c in columns), row_date, one_of)


PATIENT_ID: tuple[str, ColumnType, Role] = ("patient_id", "id", "required")

CANONICAL_TABLES: tuple[CanonicalTable, ...] = (
    _table(
        "patients",
        "birth_date",
        PATIENT_ID,
        ("birth_date", "date", "alternative"),
        ("birth_year", "year", "alternative"),
        ("sex", "text", "required"),
        ("death_date", "date", "required"),
        ("practice_id", "id", "optional"),
        ("registration_date", "date", "optional"),
        ("deregistration_date", "date", "optional"),
        one_of=(("birth_date", "birth_year"),),
    ),
    _table(
        "encounters",
        "encounter_date",
        PATIENT_ID,
        ("encounter_date", "date", "required"),
        ("encounter_type", "text", "optional"),
    ),
    _table(
        "diagnoses",
        "event_date",
        PATIENT_ID,
        ("event_date", "date", "required"),
        ("code_system", "text", "required"),
        ("code", "text", "required"),
        ("source", "text", "optional"),
    ),
    _table(
        "prescriptions",
        "start_date",
        PATIENT_ID,
        ("start_date", "date", "required"),
        ("stop_date", "date", "optional"),
        ("atc", "text", "required"),
        ("drug_text", "text", "unread"),
    ),
    _table(
        "measurements",
        "obs_date",
        PATIENT_ID,
        ("obs_date", "date", "required"),
        ("measure", "text", "required"),
        ("value_text", "text", "alternative"),
        ("value", "number", "alternative"),
        ("unit", "text", "required"),
        # The plan reads a number before its text.
        one_of=(("value", "value_text"),),
    ),
)
"""The five canonical tables, in the order they are documented and read."""

TABLES: dict[str, CanonicalTable] = {t.name: t for t in CANONICAL_TABLES}
"""The canonical tables by name."""

DATE_COLUMNS: frozenset[str] = frozenset(c for t in CANONICAL_TABLES for c in t.dates)
"""Every column, of any table, that holds a date (each name means one thing in every table)."""


def canonical_table(name: str) -> CanonicalTable:
    """The canonical table called ``name``.

    Raises:
        KeyError: No canonical table has that name.
    """
    return TABLES[name]


def all_sources() -> tuple[SourceTable, ...]:
    """Every canonical table as a plan reads it, in canonical order (the profile reads all)."""
    return tuple(t.source for t in CANONICAL_TABLES)
