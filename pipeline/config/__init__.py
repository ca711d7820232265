"""Study and condition files: pydantic models and located YAML loading."""

from pipeline.config._loader import Catalog, LoadedStudy, load_catalog, load_condition, load_study
from pipeline.config._models import (
    Condition,
    Criterion,
    Evidence,
    Followup,
    Outcomes,
    Rule,
    Study,
)

__all__ = [
    "Catalog",
    "Condition",
    "Criterion",
    "Evidence",
    "Followup",
    "LoadedStudy",
    "Outcomes",
    "Rule",
    "Study",
    "load_catalog",
    "load_condition",
    "load_study",
]
