"""``compile_study``: a study and its definitions in, a :class:`Plan` out, no I/O."""

from __future__ import annotations

from pipeline.compile import names
from pipeline.compile._as_treated import as_treated_docs, as_treated_stages, wanted
from pipeline.compile._cohort import COHORT_PASSES
from pipeline.compile._context import CompileContext, evidence_key, evidence_number
from pipeline.compile._dictionary import dictionary
from pipeline.compile._draft import Draft, Pass, adding
from pipeline.compile._episodes import episode_docs, episode_outputs, episode_stages
from pipeline.compile._evidence import evidence_stages
from pipeline.compile._matches import EVIDENCE_COUNTS, Use, match_count_stages, unmatched_uses
from pipeline.compile._matching import matched_docs, matching_outputs, matching_stages
from pipeline.compile._measurements import measurement_stages
from pipeline.compile._persontime import persontime_docs, persontime_stages
from pipeline.compile._plan import Plan
from pipeline.compile._quality import quality_stages
from pipeline.compile._rules import rule_stages
from pipeline.compile._sources import source_stages, source_tables
from pipeline.config import LoadedStudy
from pipeline.errors import AscertainError

# Data flows one way through these passes; each takes the draft plan and returns it with its
# stages added, which read only earlier ones (looked up through the draft).
PASSES: tuple[Pass, ...] = (
    adding(source_stages),
    adding(measurement_stages),
    adding(evidence_stages),
    adding(rule_stages),
    *COHORT_PASSES,
    adding(quality_stages),
    adding(match_count_stages),
    adding(persontime_stages),
    adding(matching_stages),
    adding(episode_stages),
    adding(as_treated_stages),
)


def compile_study(loaded: LoadedStudy) -> Plan:
    """Compile a loaded study into its plan of SQL stages.

    Pure: no connection, file, clock or environment is read, so the same study always gives
    the same plan.
    """
    ctx = CompileContext(loaded.study, loaded.catalog, loaded.measures, loaded.local_codes)
    _check_evidence_numbers(ctx)
    draft = Draft(ctx)
    for compile_pass in PASSES:
        draft = compile_pass(draft)
    stages = draft.stages
    persontime = ctx.study.persontime is not None
    return Plan(
        study=loaded.study.study,
        sources=source_tables(ctx),
        stages=stages,
        outputs=(
            ("cohort", names.COHORT_AS_TREATED if wanted(ctx) else names.COHORT, ("patient_id",)),
            ("population", names.POPULATION, ("patient_id",)),
            ("attrition", names.ATTRITION, ("step_number",)),
            ("quality", names.QUALITY_LOG, ("source_table", "outcome", "reason")),
            ("rows_read", names.ROWS_READ, ("source_table",)),
            (EVIDENCE_COUNTS, EVIDENCE_COUNTS, ("evidence",)),
            *(
                (("persontime", names.PERSONTIME, ("patient_id", "cell_start")),)
                if persontime
                else ()
            ),
            *matching_outputs(ctx),
            *episode_outputs(ctx),
        ),
        columns=(*dictionary(ctx), *as_treated_docs(ctx)),
        output_columns=(
            *((("persontime", persontime_docs(ctx)),) if persontime else ()),
            *((("matched", matched_docs(ctx)),) if ctx.study.matching else ()),
            *(((names.EPISODES, docs),) if (docs := episode_docs(ctx)) else ()),
        ),
    )


def unmatched_definitions(loaded: LoadedStudy, counts: dict[int, int]) -> list[Use]:
    """The study's uses of definitions that matched no row, from a run's ``evidence_counts``.

    Args:
        loaded: The study the plan was compiled from.
        counts: Evidence number -> patient-days, from the plan's ``evidence_counts`` output.
    """
    return unmatched_uses(CompileContext(loaded.study, loaded.catalog, loaded.measures), counts)


def _check_evidence_numbers(ctx: CompileContext) -> None:
    """Refuse a study two of whose evidence keys would share a number (never seen; checked)."""
    keys = {key for key, _ in ctx.evidence} | {
        evidence_key(c.condition, name) for c in ctx.conditions for name in c.evidence
    }
    seen: dict[int, str] = {}
    for key in sorted(keys):
        other = seen.setdefault(evidence_number(key), key)
        if other != key:
            raise AscertainError(
                f"evidence {other!r} and {key!r} share the number {evidence_number(key)}; "
                "rename one of them"
            )
