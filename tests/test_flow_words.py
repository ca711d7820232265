"""Every attrition step the example studies write reads as words in the report's flow diagram.

A step's box is titled by ``flow_title`` from ``STEP_TITLES`` (what the patients in the box
have); a step missing there would show its raw key ("One exposure group"). The steps are read
from each example study's compiled attrition stage, plus the matching lines a matched study's
build appends (``outputs/_matched.py``), so a new step in the compiler fails here until it has
words.
"""

from __future__ import annotations

import functools
import re
from pathlib import Path

import pytest
from sqlglot import exp

from pipeline.compile import compile_study, names
from pipeline.config import Criterion, load_study
from pipeline.outputs._matched import EXPOSED_SETS_STEP, MATCHING_LINES, MATCHING_STEPS
from pipeline.outputs.report._svg import STEP_TITLES, FlowStep, flow_side, render_flow

STUDIES = Path(__file__).resolve().parents[1] / "definitions" / "studies"
EXAMPLES = sorted(p for p in STUDIES.glob("*.yaml") if not p.read_text().startswith("sweep:"))


@functools.cache
def _attrition_steps(study: Path) -> list[str]:
    """The step names of the study's attrition log, in order, as its build writes them."""
    loaded = load_study(study)
    plan = compile_study(loaded)
    attrition = next(s for s in plan.stages if s.name == names.ATTRITION).query
    rows = [s for s in attrition.find_all(exp.Select) if len(s.expressions) == 6]
    steps = [row.expressions[1].unalias() for row in rows]
    found = [s.this for s in steps if isinstance(s, exp.Literal) and s.is_string]
    option = loaded.study.matching
    if option is None:
        return found
    return (
        found
        + ([EXPOSED_SETS_STEP] if option.exposed_in else list(MATCHING_STEPS[:1]))
        + list(MATCHING_STEPS[1:])
    )


def test_the_examples_cover_both_new_designs() -> None:
    everything = {step for study in EXAMPLES for step in _attrition_steps(study)}
    assert {"new_user", "one_exposure_group", *MATCHING_LINES} <= everything


@pytest.mark.parametrize("study", EXAMPLES, ids=lambda p: p.stem)
def test_every_step_of_an_example_study_has_a_title(study: Path) -> None:
    steps = _attrition_steps(study)
    assert "source_population" in steps  # the steps were found
    assert [s for s in steps if s not in STEP_TITLES] == []


def test_every_kind_of_eligibility_step_has_a_title() -> None:
    # the compiler names a step by its key, or by _STEP_NAMES in compile/_cohort.py
    from pipeline.compile._cohort import _STEP_NAMES

    kinds = [_STEP_NAMES.get(k, k) for k in Criterion.model_fields]
    assert [k for k in kinds if k not in STEP_TITLES] == []


def _flow(steps: list[tuple[str, int, int]], **options: int) -> str:
    return render_flow(
        [
            FlowStep(s, s, str(b), str(b - r), str(r), True, STEP_TITLES[s], flow_side(s))
            for s, b, r in steps
        ],
        **options,
    )


def test_a_matched_flow_keeps_the_cohort_box_on_the_cohort() -> None:
    # the cohort is the last eligibility step; the set lines after it count sets, not patients
    steps = [
        ("alive_at_index", 100, 90),
        ("match_cases", 90, 6),
        ("match_any_control", 6, 5),
        ("match_all_controls", 5, 4),
    ]
    svg = _flow(steps, cohort=0)
    titles = re.findall(r'class="box-title">([^<]*)<', svg)
    assert titles == [
        "Candidates",
        "Analysis cohort",
        "Matched sets, one per incident case",
        "Sets with at least one control",
        "Sets with every control",
    ]
    sides = re.findall(r'class="side-title">([^<]*)<', svg)
    assert sides == ["Excluded:", "Not a case:", "No control found:", "Fewer controls:"]
