"""``matched.parquet`` from the plan's ranked draws, and the matching lines of the attrition log.

The plan (``compile/_matching.py``) ranks every eligible control of each set by its draw key.
With replacement it already kept the first ``controls_per_case`` of each set; this module only
lays the sets out. Without replacement a patient may be a control in one set only, so the sets
are filled here, one after another in order of set date then case id (``set_id``), each taking
its best-ranked candidates not yet taken. The fill reads rows in a fixed order and runs in
Python on the same fetched rows whatever the engine, so both engines give the same sets. Its
cost grows with the candidate rows fetched (each is looked at once), which the plan bounds by
the ranks an earlier set could take.
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import pairwise

import pyarrow as pa

from pipeline.config._matching import Matching
from pipeline.errors import AscertainError

MATCHING_STEPS = ("match_cases", "match_any_control", "match_all_controls")
"""The attrition log's matching lines, after the eligibility steps (sets opened by cases)."""

EXPOSED_SETS_STEP = "match_exposed"
"""The first matching line when new users of a group open the sets (``exposed_in``)."""

MATCHING_LINES = (*MATCHING_STEPS, EXPOSED_SETS_STEP)
"""Every step name a matching line may have: a reader finds where the lines start by these."""


@dataclass(frozen=True)
class MatchSummary:
    """How many sets got all their controls, fewer, or none.

    Attributes:
        cases: Sets (one per incident case, or new user of the group, in the cohort).
        full: Sets with ``controls_per_case`` controls.
        fewer: Sets with at least one control but fewer than ``controls_per_case``.
        none: Sets without a control.
        controls: Control rows over all sets.
        distinct_controls: Patients who are a control in at least one set.
    """

    cases: int
    full: int
    fewer: int
    none: int
    controls: int
    distinct_controls: int


def fill_sets(
    draws: list[tuple[int, object, int]], set_ids: list[int], option: Matching
) -> dict[int, list[int]]:
    """Each set's controls, as positions into ``draws``, in draw order.

    Args:
        draws: (set id, patient id, draw rank) sorted by set id then rank.
        set_ids: Every set id, ascending.
        option: The study's matching option.

    Without replacement a set takes its best-ranked candidates that no earlier set took.
    """
    chosen: dict[int, list[int]] = {s: [] for s in set_ids}
    taken: set[object] = set()
    k = option.controls_per_case
    for position, (set_id, patient, _) in enumerate(draws):
        picked = chosen[set_id]
        if len(picked) == k:
            continue
        if not option.reuse_controls:
            if patient in taken:
                continue
            taken.add(patient)
        picked.append(position)
    return chosen


def _check_sorted(draws: list[tuple[int, object, int]]) -> None:
    """The fill is only right on rows in set then rank order; refuse anything else."""
    for before, after in pairwise(draws):
        if (before[0], before[2]) >= (after[0], after[2]):
            raise AscertainError(
                f"matching draws are not in set and rank order at set {after[0]} "
                f"(rank {before[2]} then {after[2]}); this is a bug in ascertain"
            )


def matched_table(
    sets: pa.Table, draws: pa.Table, option: Matching, patient_type: pa.DataType
) -> tuple[pa.Table, MatchSummary]:
    """``matched.parquet``: each set's case, then its controls, with the matching variables.

    Args:
        sets: The plan's ``matching_sets`` output (sorted by set id).
        draws: The plan's ``matching_draws`` output (sorted by set id, then draw rank).
        option: The study's matching option.
        patient_type: The cohort's ``patient_id`` type, which the file keeps.
    """
    set_rows = sets.to_pylist()
    draw_rows = draws.to_pylist()
    keyed = [(r["set_id"], r["patient_id"], r["draw_rank"]) for r in draw_rows]
    _check_sorted(keyed)
    chosen = fill_sets(keyed, [r["set_id"] for r in set_rows], option)
    out: dict[str, list[object]] = {name: [] for name, _ in _columns(option)}

    def add(row: dict[str, object], set_row: dict[str, object], role: str, number: int) -> None:
        out["set_id"].append(set_row["set_id"])
        out["role"].append(role)
        out["control_number"].append(number)
        out["patient_id"].append(row["patient_id"])
        out["index_date"].append(set_row["set_date"])
        out["sex"].append(row["sex"])
        out["birth_year"].append(row["birth_year"])
        if option.same_practice:
            out["practice_id"].append(row["practice_id"])

    sizes = []
    for set_row in set_rows:
        add(set_row, set_row, option.opener_role, 0)
        picked = chosen[set_row["set_id"]]
        sizes.append(len(picked))
        for number, position in enumerate(picked, start=1):
            add(draw_rows[position], set_row, "control", number)
    k = option.controls_per_case
    controls = {draw_rows[p]["patient_id"] for picked in chosen.values() for p in picked}
    summary = MatchSummary(
        cases=len(sizes),
        full=sum(n == k for n in sizes),
        fewer=sum(0 < n < k for n in sizes),
        none=sum(n == 0 for n in sizes),
        controls=sum(sizes),
        distinct_controls=len(controls),
    )
    schema = pa.schema(
        [(name, patient_type if name == "patient_id" else kind) for name, kind in _columns(option)]
    )
    return pa.table({name: out[name] for name in schema.names}, schema=schema), summary


def _columns(option: Matching) -> list[tuple[str, pa.DataType]]:
    columns = [
        ("set_id", pa.int32()),
        ("role", pa.string()),
        ("control_number", pa.int32()),
        ("patient_id", pa.string()),
        ("index_date", pa.date32()),
        ("sex", pa.string()),
        ("birth_year", pa.int32()),
    ]
    return columns + ([("practice_id", pa.string())] if option.same_practice else [])


def with_matching_lines(
    attrition: pa.Table, summary: MatchSummary, option: Matching, cohort_size: int
) -> pa.Table:
    """The attrition log with three matching lines after the eligibility steps.

    Cases (or new users of the group), then sets with a control, then sets with every
    control: each line's remaining is the next one's before, so the report draws them as the
    flow's continuation.
    """
    last = max(attrition.column("step_number").to_pylist(), default=0)
    k, name = option.controls_per_case, option.opener
    some = summary.full + summary.fewer
    first = (
        (
            "match_cases",
            f"incident {name} cases in the cohort: one matched set each, dated on the onset",
        )
        if option.exposed_in is None
        else (
            EXPOSED_SETS_STEP,
            f"new users of {name} in the cohort: one matched set each, dated on the index date",
        )
    )
    lines = [
        (*first, cohort_size, summary.cases),
        ("match_any_control", "sets with at least one control", summary.cases, some),
        ("match_all_controls", f"sets with all {k} controls", some, summary.full),
    ]
    extra = pa.table(
        {
            "step_number": [last + i for i in range(1, len(lines) + 1)],
            "step": [line[0] for line in lines],
            "description": [line[1] for line in lines],
            "patients_before": [line[2] for line in lines],
            "removed": [line[2] - line[3] for line in lines],
            "remaining": [line[3] for line in lines],
        },
        schema=attrition.schema,
    )
    return pa.concat_tables([attrition, extra])


def matched_outputs(
    outputs: dict[str, pa.Table],
    option: Matching | None,
    cohort: pa.Schema,
    cohort_rows: int,
) -> tuple[pa.Table | None, pa.Table, MatchSummary | None]:
    """``matched.parquet``'s table, the attrition log with its matching lines, and the summary.

    From a run's outputs, and the cohort's schema (its ``patient_id`` type) and row count: the
    cohort itself is streamed to its file, never held here. None and the log unchanged for a
    study without ``matching:``.
    """
    attrition = outputs["attrition"]
    if option is None:
        return None, attrition, None
    matched, summary = matched_table(
        outputs["matching_sets"],
        outputs["matching_draws"],
        option,
        cohort.field("patient_id").type,
    )
    return matched, with_matching_lines(attrition, summary, option, cohort_rows), summary
