"""Compile a study into a plan of named SQL stages (sqlglot trees), without running anything.

:mod:`pipeline.compile.names` imports nothing of the package, so the statistics, the report
and the workflows read the analysis table's column names from it. To keep that import light,
this package loads its other modules only when one of their names is first used (PEP 562):
importing ``names`` never loads the compiler (sqlglot and every pass).
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

from pipeline.compile import names

if TYPE_CHECKING:
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

_WHERE = {
    "EVIDENCE_COUNTS": "pipeline.compile._matches",
    "PASSES": "pipeline.compile._compiler",
    "POSITION_BASE": "pipeline.compile._plan",
    "READING_PATTERN": "pipeline.compile._measurements",
    "SOURCE_DIALECT": "pipeline.compile._plan",
    "SOURCE_POSITION": "pipeline.compile._plan",
    "SOURCE_PROBLEM": "pipeline.compile._plan",
    "ColumnDoc": "pipeline.compile._plan",
    "Plan": "pipeline.compile._plan",
    "SourceTable": "pipeline.compile._plan",
    "Stage": "pipeline.compile._plan",
    "Use": "pipeline.compile._matches",
    "compile_study": "pipeline.compile._compiler",
    "unmatched_definitions": "pipeline.compile._compiler",
    "unreadable_patient_date": "pipeline.compile._sources",
}

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


def __getattr__(name: str) -> Any:
    """Load a public name's module on first use (see the module docstring)."""
    if name not in _WHERE:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(import_module(_WHERE[name]), name)
    globals()[name] = value
    return value
