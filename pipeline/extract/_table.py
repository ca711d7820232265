"""What discovery finds for one canonical table, and what every engine binds."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Literal

from pipeline.config._mapping import TableMapping
from pipeline.extract._hadoop import HadoopPath

FileFormat = Literal["csv", "parquet", "fhir"]

# A local path, or a file or folder on one of Spark's Hadoop file systems.
ExtractPath = Path | HadoopPath


@dataclass(frozen=True)
class ExtractTable:
    """One canonical table found in the extract.

    Attributes:
        name: Canonical table name.
        files: The files holding it (several for a folder of Parquet parts), sorted.
        file_format: ``csv``, ``parquet`` or ``fhir`` (a FHIR R4 bulk-data export).
        columns: Column names present in the file, lower-cased, in file order (for ``fhir``,
            the canonical columns the engine derives from the resources).
        resources: For ``fhir``, the resource type each file holds (parallel to ``files``).
        mapping: When read through a site mapping file, how its columns map to ours.
    """

    name: str
    files: tuple[ExtractPath, ...]
    file_format: FileFormat
    columns: tuple[str, ...]
    resources: tuple[str, ...] = ()
    mapping: TableMapping | None = None

    @property
    def provides(self) -> tuple[str, ...]:
        """The canonical columns this table provides (through the mapping, if it has one)."""
        return tuple(self.mapping.columns) if self.mapping is not None else self.columns
