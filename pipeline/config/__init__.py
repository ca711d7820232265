"""Study and condition files: pydantic models and located YAML loading."""

from pipeline.config._codelist import CodeList, CodeListHeader, ListedCode, load_code_list
from pipeline.config._condition import (
    Condition,
    DiagnosisCodes,
    DiagnosisEvidence,
    EncounterEvidence,
    Evidence,
    MeasurementEvidence,
    PrescriptionEvidence,
    Provenance,
    Rule,
)
from pipeline.config._listuse import ListUse
from pipeline.config._loader import Catalog, LoadedStudy, load_catalog, load_condition, load_study
from pipeline.config._measure import load_measure_file, load_measures, shipped_measures
from pipeline.config._study import (
    Covariate,
    Criterion,
    Followup,
    IndexRule,
    Outcomes,
    Study,
    Window,
)

__all__ = [
    "Catalog",
    "CodeList",
    "CodeListHeader",
    "Condition",
    "Covariate",
    "Criterion",
    "DiagnosisCodes",
    "DiagnosisEvidence",
    "EncounterEvidence",
    "Evidence",
    "Followup",
    "IndexRule",
    "ListUse",
    "ListedCode",
    "LoadedStudy",
    "MeasurementEvidence",
    "Outcomes",
    "PrescriptionEvidence",
    "Provenance",
    "Rule",
    "Study",
    "Window",
    "load_catalog",
    "load_code_list",
    "load_condition",
    "load_measure_file",
    "load_measures",
    "load_study",
    "shipped_measures",
]
