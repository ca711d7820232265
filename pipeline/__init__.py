"""ascertain: analysis-ready study cohorts from coded primary-care EMR extracts.

The library's front door; the ``ascertain`` command line is a thin layer over these. Each name
is imported on first use, so a build does not load the statistics libraries (scipy takes half a
second to import) that only validation and reports need.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from pipeline.compile import Plan, compile_study
    from pipeline.config import load_study
    from pipeline.errors import AscertainError, ConfigError, EngineError, ExtractError
    from pipeline.workflows.build import BuildResult, build_study, plan_study
    from pipeline.workflows.diff import diff_runs
    from pipeline.workflows.explain import explain_patient
    from pipeline.workflows.prepare import BuildOptions
    from pipeline.workflows.profile import profile_extract
    from pipeline.workflows.validate import validate_study
    from pipeline.workflows.verify import verify_output

_HOMES = {
    "AscertainError": "pipeline.errors",
    "BuildOptions": "pipeline.workflows.prepare",
    "BuildResult": "pipeline.workflows.build",
    "ConfigError": "pipeline.errors",
    "EngineError": "pipeline.errors",
    "ExtractError": "pipeline.errors",
    "Plan": "pipeline.compile",
    "build_study": "pipeline.workflows.build",
    "compile_study": "pipeline.compile",
    "diff_runs": "pipeline.workflows.diff",
    "explain_patient": "pipeline.workflows.explain",
    "load_study": "pipeline.config",
    "plan_study": "pipeline.workflows.build",
    "profile_extract": "pipeline.workflows.profile",
    "validate_study": "pipeline.workflows.validate",
    "verify_output": "pipeline.workflows.verify",
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
