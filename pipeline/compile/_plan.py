"""The plan: an ordered tuple of named SQL stages, a value you can print, diff and hash.

Nothing here touches a database. Engines take a plan and run it; ``describe`` renders it.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from typing import Literal

from sqlglot import exp

from pipeline.compile._reads import relations_read
from pipeline.extract.schema import POSITION_BASE, SOURCE_POSITION, SOURCE_PROBLEM, SourceTable

# The dialect the stage templates are written in; engines render to their own.
SOURCE_DIALECT = "duckdb"

__all__ = [
    "POSITION_BASE",
    "SOURCE_DIALECT",
    "SOURCE_POSITION",
    "SOURCE_PROBLEM",
    "ColumnDoc",
    "Plan",
    "SourceTable",
    "Stage",
]


@dataclass(frozen=True)
class ColumnDoc:
    """One row of the analysis table's data dictionary."""

    column: str
    type: str
    unit: str
    meaning: str
    computed: str
    sources: str


@dataclass(frozen=True)
class Stage:
    """One named step of the plan.

    Attributes:
        name: Unique snake_case name; later stages refer to it as a table.
        query: The stage's query as a sqlglot tree, in the source dialect.
        description: Why the stage exists, in one line; shown by ``describe``.
        kind: ``table`` is materialised; ``view`` is inlined where it is read; ``check`` must
            return no rows, otherwise the run fails with ``failure`` and the first rows found.
        failure: For checks, the message shown when rows are returned.
        depends_on: The stages and source relations it reads, read from ``query`` itself
            (:func:`relations_read`), never written by hand: a declared list could drift from
            the query, and the sweep shares stages along these edges.
    """

    name: str
    query: exp.Query
    description: str
    kind: Literal["table", "view", "check"] = "table"
    failure: str = ""
    depends_on: tuple[str, ...] = field(init=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "depends_on", relations_read(self.query))

    def render(self, dialect: str) -> str:
        """Render the stage's query as SQL text for one dialect."""
        return self.query.sql(dialect=dialect, pretty=True)


@dataclass(frozen=True)
class Plan:
    """Everything an engine needs to build one study's cohort.

    Attributes:
        study: The study's name.
        sources: Extract tables the plan reads.
        stages: Stages in dependency order.
        outputs: Output name (``cohort``, ``attrition``, ...) -> the stage that holds it, with
            the columns it must be sorted by.
        columns: The data dictionary of the analysis table.
        output_columns: The data dictionaries of further outputs written as files of their own
            (``persontime``), by output name.
    """

    study: str
    sources: tuple[SourceTable, ...]
    stages: tuple[Stage, ...]
    outputs: tuple[tuple[str, str, tuple[str, ...]], ...]
    columns: tuple[ColumnDoc, ...] = ()
    output_columns: tuple[tuple[str, tuple[ColumnDoc, ...]], ...] = ()

    def __post_init__(self) -> None:
        known = {s.relation for s in self.sources}
        for stage in self.stages:
            missing = [d for d in stage.depends_on if d not in known]
            if missing:
                raise ValueError(f"stage {stage.name} reads {missing} before they exist")
            if stage.name in known:
                raise ValueError(f"stage name {stage.name} is used twice")
            known.add(stage.name)
        for _, stage_name, _ in self.outputs:
            if stage_name not in known:
                raise ValueError(f"output stage {stage_name} is not in the plan")

    def stage(self, name: str) -> Stage:
        """Return a stage by name.

        Raises:
            KeyError: No stage has that name.
        """
        for stage in self.stages:
            if stage.name == name:
                return stage
        raise KeyError(name)

    def through(self, name: str, order: tuple[str, ...] = ("patient_id",)) -> Plan:
        """The smallest plan that computes stage ``name``, with that stage as its only output.

        Used to run one stage and what it reads, e.g. in tests or when tracing one patient.

        Raises:
            KeyError: No stage has that name.
        """
        needed = {name}
        for stage in reversed(self.stages):
            if stage.name in needed:
                needed.update(stage.depends_on)
        self.stage(name)
        return Plan(
            study=self.study,
            sources=tuple(s for s in self.sources if s.relation in needed),
            stages=tuple(s for s in self.stages if s.name in needed),
            outputs=((name, name, order),),
        )

    def with_outputs(self, names: tuple[str, ...]) -> Plan:
        """The same stages with some of them (tables or views) as the outputs, unsorted."""
        for name in names:
            self.stage(name)
        outputs = tuple((name, name, ()) for name in names)
        return Plan(
            self.study, self.sources, self.stages, outputs, self.columns, self.output_columns
        )

    def describe(self, dialect: str = SOURCE_DIALECT, *, only: str | None = None) -> str:
        """The plan as commented SQL, one stage after another (what ``ascertain sql`` prints).

        Named ``describe`` so that "explain" means only the ``explain`` command (one patient's
        trace).
        """
        parts = [f"-- plan for study {self.study} ({len(self.stages)} stages, dialect {dialect})"]
        for source in self.sources:
            parts.append(f"-- reads {source.relation}: {', '.join(source.columns)}")
        for stage in self.stages:
            if only is not None and stage.name != only:
                continue
            header = f"-- stage {stage.name} [{stage.kind}]: {stage.description}"
            if stage.depends_on:
                header += f"\n-- reads: {', '.join(stage.depends_on)}"
            parts.append(f"{header}\n{stage.render(dialect)};")
        return "\n\n".join(parts) + "\n"

    def content_hash(self) -> str:
        """A SHA-256 of the plan's SQL and shape, stored with outputs to tie them to the plan."""
        digest = hashlib.sha256(self.describe(SOURCE_DIALECT).encode("utf-8"))
        for name, stage_name, order in self.outputs:
            digest.update(f"{name}:{stage_name}:{','.join(order)}".encode())
        return digest.hexdigest()
