"""Compile a study into a plan of named SQL stages (sqlglot trees), without running anything."""

from pipeline.compile import names
from pipeline.compile._compiler import PASSES, compile_study, unmatched_definitions
from pipeline.compile._matches import EVIDENCE_COUNTS, Use
from pipeline.compile._measurements import READING_PATTERN
from pipeline.compile._plan import (
    POSITION_BASE,
    SOURCE_DIALECT,
    SOURCE_POSITION,
    SOURCE_PROBLEM,
    ColumnDoc,
    Plan,
    SourceTable,
    Stage,
)
from pipeline.compile._sources import unreadable_patient_date

__all__ = [
    "EVIDENCE_COUNTS",
    "PASSES",
    "POSITION_BASE",
    "READING_PATTERN",
    "SOURCE_DIALECT",
    "SOURCE_POSITION",
    "SOURCE_PROBLEM",
    "ColumnDoc",
    "Plan",
    "SourceTable",
    "Stage",
    "Use",
    "compile_study",
    "names",
    "unmatched_definitions",
    "unreadable_patient_date",
]
