"""Many plans as one: stages two plans compute identically run once.

A stage's *fingerprint* is a hash of its name, kind and SQL and of the fingerprints of what it
reads (taken from its tree, :func:`relations_read`), so two stages have the same fingerprint
only if they and everything upstream of them, transitively, are the same SQL. Such stages are
computed once; every other stage gets a name of its own per plan, and the references to it in
the stages that read it are renamed.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from dataclasses import dataclass

from sqlglot import exp

from pipeline.compile._plan import SOURCE_DIALECT, Plan, SourceTable, Stage
from pipeline.compile._reads import relations_read


def fingerprints(plan: Plan) -> dict[str, str]:
    """Each stage's fingerprint: its name, kind, SQL and its inputs' fingerprints, transitively.

    A source relation's fingerprint is its name: every plan reads the same extract.
    """
    found: dict[str, str] = {s.relation: f"source:{s.relation}" for s in plan.sources}
    for stage in plan.stages:
        digest = hashlib.sha256(f"{stage.name}\n{stage.kind}\n".encode())
        digest.update(stage.render(SOURCE_DIALECT).encode("utf-8"))
        for name in relations_read(stage.query):
            digest.update(f"\n{name}={found[name]}".encode())
        found[stage.name] = digest.hexdigest()
    return found


@dataclass(frozen=True)
class MergedPlan:
    """One plan computing the outputs of several.

    Attributes:
        plan: The merged plan; its outputs are named ``<plan key>/<output>``.
        names: Per plan key, each of its stages' name in the merged plan.
        shared: Names of the merged plan's stages that more than one plan uses.
        stages_alone: How many stages the plans would run one by one (after pruning).
    """

    plan: Plan
    names: dict[str, dict[str, str]]
    shared: tuple[str, ...]
    stages_alone: int


def _needed(plan: Plan, outputs: tuple[str, ...]) -> set[str]:
    """Stages the outputs read, transitively, and every check stage with what it reads."""
    wanted = {stage for name, stage, _ in plan.outputs if name in outputs}
    wanted |= {s.name for s in plan.stages if s.kind == "check"}
    for stage in reversed(plan.stages):
        if stage.name in wanted:
            wanted.update(stage.depends_on)
    return wanted


def _renamed(query: exp.Query, names: Mapping[str, str]) -> exp.Query:
    """The query with references to other relations renamed (its own CTEs untouched)."""
    own = {cte.alias for cte in query.find_all(exp.CTE)}

    def rename(node: exp.Expression) -> exp.Expression:
        if isinstance(node, exp.Table) and node.name not in own and node.name in names:
            new = names[node.name]
            if new != node.name:
                node = node.copy()
                node.set("this", exp.to_identifier(new))
        return node

    return query.transform(rename)


def _sources(plans: Mapping[str, Plan]) -> tuple[SourceTable, ...]:
    """Every source table any plan reads, with the union of the columns each needs."""
    merged: dict[str, SourceTable] = {}
    for plan in plans.values():
        for source in plan.sources:
            old = merged.get(source.name)
            if old is None:
                merged[source.name] = source
                continue
            required = tuple(dict.fromkeys(old.required + source.required))
            one_of = tuple(dict.fromkeys(old.one_of + source.one_of))
            optional = tuple(
                c for c in dict.fromkeys(old.optional + source.optional) if c not in required
            )
            merged[source.name] = SourceTable(source.name, required, optional, one_of)
    return tuple(merged[name] for name in sorted(merged))


def merge_plans(plans: Mapping[str, Plan], outputs: tuple[str, ...]) -> MergedPlan:
    """One plan computing ``outputs`` of every plan, each shared stage once.

    Args:
        plans: Plans by key (a variant's name), the first one's stage names kept as they are;
            a stage of a later plan that differs is named ``<stage>__<key>``.
        outputs: The outputs wanted of every plan (``cohort``, ...).

    Returns:
        The merged plan, with outputs ``<key>/<output>``, and what was shared.
    """
    by_print: dict[str, str] = {}  # fingerprint -> merged name
    users: dict[str, set[str]] = {}
    names: dict[str, dict[str, str]] = {}
    stages: list[Stage] = []
    taken: set[str] = set()
    merged_outputs = []
    alone = 0
    for key, plan in plans.items():
        prints = fingerprints(plan)
        needed = _needed(plan, outputs)
        local: dict[str, str] = {s.relation: s.relation for s in plan.sources}
        for stage in plan.stages:
            if stage.name not in needed:
                continue
            alone += 1
            mark = prints[stage.name]
            if mark not in by_print:
                name = stage.name if stage.name not in taken else f"{stage.name}__{key}"
                taken.add(name)
                by_print[mark] = name
                query = _renamed(stage.query, local)
                stages.append(Stage(name, query, stage.description, stage.kind, stage.failure))
            local[stage.name] = by_print[mark]
            users.setdefault(by_print[mark], set()).add(key)
        names[key] = {k: v for k, v in local.items() if not k.startswith("src_")}
        for output, stage_name, order in plan.outputs:
            if output in outputs:
                merged_outputs.append((f"{key}/{output}", local[stage_name], order))
    first = next(iter(plans.values()))
    plan = Plan(first.study, _sources(plans), tuple(stages), tuple(merged_outputs))
    shared = tuple(s.name for s in stages if len(users[s.name]) > 1)
    return MergedPlan(plan, names, shared, alone)
