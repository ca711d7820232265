"""ascertain: analysis-ready study cohorts from coded primary-care EMR extracts.

The library's front door; the ``ascertain`` command line is a thin layer over these.
"""

from pipeline._build import BuildOptions, BuildResult, build_study, plan_study, verify_output
from pipeline._diff import diff_runs
from pipeline._explain import explain_patient
from pipeline._profile import profile_extract
from pipeline._validate import validate_study
from pipeline.compile import Plan, compile_study
from pipeline.config import load_study
from pipeline.errors import AscertainError, ConfigError, EngineError, ExtractError

__all__ = [
    "AscertainError",
    "BuildOptions",
    "BuildResult",
    "ConfigError",
    "EngineError",
    "ExtractError",
    "Plan",
    "build_study",
    "compile_study",
    "diff_runs",
    "explain_patient",
    "load_study",
    "plan_study",
    "profile_extract",
    "validate_study",
    "verify_output",
]
