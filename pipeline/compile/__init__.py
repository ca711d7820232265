"""Compile a study into a plan of named SQL stages (sqlglot trees), without running anything."""

from pipeline.compile._compiler import PASSES, compile_study
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
    "PASSES",
    "POSITION_BASE",
    "SOURCE_DIALECT",
    "SOURCE_POSITION",
    "SOURCE_PROBLEM",
    "ColumnDoc",
    "Plan",
    "SourceTable",
    "Stage",
    "compile_study",
    "unreadable_patient_date",
]
