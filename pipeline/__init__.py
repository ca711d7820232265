"""ascertain: analysis-ready study cohorts from coded primary-care EMR extracts.

The library's front door; the ``ascertain`` command line is a thin layer over these. Each name
is imported on first use, so a build does not load the statistics libraries (scipy takes half a
second to import) that only validation and reports need.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from pipeline._build import BuildOptions, BuildResult, build_study, plan_study, verify_output
    from pipeline._diff import diff_runs
    from pipeline._explain import explain_patient
    from pipeline._profile import profile_extract
    from pipeline._validate import validate_study
    from pipeline.compile import Plan, compile_study
    from pipeline.config import load_study
    from pipeline.errors import AscertainError, ConfigError, EngineError, ExtractError

_HOMES = {
    "AscertainError": "pipeline.errors",
    "BuildOptions": "pipeline._build",
    "BuildResult": "pipeline._build",
    "ConfigError": "pipeline.errors",
    "EngineError": "pipeline.errors",
    "ExtractError": "pipeline.errors",
    "Plan": "pipeline.compile",
    "build_study": "pipeline._build",
    "compile_study": "pipeline.compile",
    "diff_runs": "pipeline._diff",
    "explain_patient": "pipeline._explain",
    "load_study": "pipeline.config",
    "plan_study": "pipeline._build",
    "profile_extract": "pipeline._profile",
    "validate_study": "pipeline._validate",
    "verify_output": "pipeline._build",
}

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


def __getattr__(name: str) -> Any:
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module 'pipeline' has no attribute {name!r}")
    found = getattr(import_module(home), name)
    globals()[name] = found
    return found


def __dir__() -> list[str]:
    return sorted(__all__)
